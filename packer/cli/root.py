"""The one typer app behind the `danpack` command; each command lives in its own module."""

from typing import Optional

import typer
from typer.core import TyperCommand


class PlainCommand(TyperCommand):
    """Help in plain words: arguments by their names (MODEL_DIR, not `{model_dir} <path>`), options by their
    metavars, no Python type names. Every danpack command uses it: `app.command(NAME, cls=PlainCommand)`."""

    def collect_usage_pieces(self, ctx) -> list[str]:
        pieces = [self.options_metavar] if self.options_metavar else []
        for param in self.get_params(ctx):
            if param.param_type_name == "argument":
                name = param.metavar or param.name.upper()
                pieces.append(name if param.required else f"[{name}]")
        return pieces

    def format_options(self, ctx, formatter) -> None:
        args, opts = [], []
        for param in self.get_params(ctx):
            if param.param_type_name == "argument":
                args.append((param.metavar or param.name.upper(),
                             (param.help or "") + ("  [required]" if param.required else "")))
            elif param.param_type_name == "option" and (record := param.get_help_record(ctx)) is not None:
                opts.append(record)
        if args:
            with formatter.section("Arguments"):
                formatter.write_dl(args)
        if opts:
            with formatter.section("Options"):
                formatter.write_dl(opts)


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
