"""The one typer app behind the `danpack` command; each command lives in its own module."""

from typing import Optional

import typer

app = typer.Typer(
    name="danpack",
    help="Pack a trained deep averaging network (DAN) text classifier into one small int8 bundle, "
    "check it against the float original, and run the demo.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_show_locals=False,
    rich_markup_mode=None,  # help texts are plain: "[default: …]" and "danpack[glove]" must print as written
)


def _show_version(value: bool) -> None:
    if value:
        from danpack import __version__

        typer.echo(f"danpack {__version__}")
        raise typer.Exit()


@app.callback()
def root(
    version: Optional[bool] = typer.Option(None, "--version", callback=_show_version, is_eager=True,
                                           help="Print the version and exit."),
) -> None:
    """Keeps every command a subcommand, however many are registered."""
