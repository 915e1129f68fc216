"""The one typer app behind the `danpack` command; each command lives in its own module."""

import typer

app = typer.Typer(
    name="danpack",
    help="Pack a trained deep averaging network (DAN) text classifier into one small int8 bundle, "
    "check it against the float original, and run the demo.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_show_locals=False,
)
