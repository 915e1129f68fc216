"""`danpack frontier`: bundle bytes against held-out agreement, as JSON, a table and a plot."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from danpack.cli.common import fail, interruptible
from danpack.cli.pack import _read_keep_words
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError

# The library (numpy, onnx, matplotlib) is imported inside the command: `danpack --help` stays fast.


@app.command("frontier", cls=PlainCommand,
             short_help="Measure candidate bundles and plot their size against agreement with the float model.")
def frontier_command(
    model_dir: Path = typer.Argument(..., metavar="MODEL_DIR", help="Float model directory (dan.json, tokens.txt, weights.npz or weights.safetensors)."),
    corpus: list[Path] = typer.Option(..., "--corpus", "-c", metavar="FILE", help="Unlabelled deployment-domain texts, as for `danpack pack` (about 1 in 7 is held out to measure); repeatable."),
    output: Path = typer.Option(..., "--output", "-o", metavar="DIR", help="Folder for frontier.json, frontier.svg and frontier.png."),
    eval_file: Optional[Path] = typer.Option(None, "--eval", metavar="FILE", help="Texts (JSONL, CSV or TSV) also measured at every point; with a 'label' field, accuracy too."),
    text_field: str = typer.Option("text", metavar="NAME", help="Field (JSONL) or column (CSV/TSV) holding the text."),
    keep_words: Optional[Path] = typer.Option(None, metavar="FILE", help="File of tokens (one per line) always kept, as for `danpack pack`."),
    pruned: str = typer.Option("auto", metavar="auto|skip|unk|rest", help="Pruned-token policies to try: auto (every one the model can use), skip, unk or rest."),
    fold: str = typer.Option("auto", metavar="auto|yes|no", help="Fold modes to try: auto (both, when the model has a hidden layer), yes or no."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress on stderr."),
) -> None:
    """Measure a grid of candidate bundles (rows x pruned policy x fold) on held-out corpus texts; write the
    frontier of bytes against agreement with the float model, and the `danpack pack` line of the recommended point."""
    from danpack.files import check_outputs
    from danpack.model import model_files
    from danpack.pack.build import PackOptions
    from danpack.pack.frontier import FrontierOptions, format_table, run_frontier, write_frontier
    from danpack.progress import Steps

    if output.exists() and not output.is_dir():
        fail(f"--output {output} is a file, not a folder; give the folder to write frontier.json and the plots into")
    if not output.parent.is_dir():  # as for every output: a typo must not create a tree of folders
        fail(f"--output {output}: the folder {output.parent} does not exist; create it first (mkdir -p "
             f"{output.parent}) or correct the path")
    try:
        output.mkdir(exist_ok=True)
        inputs = {**{f"model file {n}": p for n, p in model_files(model_dir).items()},
                  **{f"--corpus {p}": p for p in corpus}, "--eval": eval_file, "--keep-words": keep_words}
        check_outputs({f"--output {output}/{name}": output / name
                       for name in ("frontier.json", "frontier.svg", "frontier.png")}, inputs)
        pack = PackOptions(corpora=tuple(str(p) for p in corpus), text_field=text_field,
                           keep_words=_read_keep_words(keep_words), pruned=pruned, fold=fold)
        options = FrontierOptions(pack, None if eval_file is None else str(eval_file),
                                  None if keep_words is None else str(keep_words))
        with interruptible(f"nothing was written in {output}"):
            result = run_frontier(model_dir, options, Steps(5 + (eval_file is not None), quiet=quiet))
            json_path, plots, no_plot = write_frontier(result, output)
    except DanpackError as e:
        fail(str(e))
    for line in format_table(result):
        typer.echo(line)
    typer.echo(f"wrote {json_path}" + "".join(f", {p}" for p in plots))
    if no_plot:
        typer.echo(f"no plot: {no_plot}", err=True)
