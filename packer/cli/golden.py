"""`danpack golden`: write a bundle's conformance records, or check a host's outputs against them."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from danpack.cli.common import fail
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError

# The library (numpy, onnxruntime, the golden kit) is imported inside the command: `danpack --help` stays fast.


@app.command("golden", cls=PlainCommand,
             short_help="Write a bundle's conformance records, or check a host's outputs against them.")
def golden_command(
    bundle: Optional[Path] = typer.Argument(None, metavar="BUNDLE", help="Bundle file written by `danpack pack` (to write records)."),
    output: Optional[Path] = typer.Option(None, "--output", "-o", metavar="FILE", help="Golden JSONL file to write."),
    texts: list[Path] = typer.Option([], "--texts", metavar="FILE", help="More texts of your own (plain lines, .jsonl, .csv or .tsv); repeatable."),
    text_field: str = typer.Option("text", metavar="NAME", help="Field (JSONL) or column (CSV/TSV) holding the text in your text files."),
    backend: str = typer.Option("onnxruntime", metavar="onnxruntime|numpy", help="Runtime backend that computes the records: onnxruntime or numpy."),
    verify: Optional[Path] = typer.Option(None, "--verify", metavar="GOLDEN", help="Golden JSONL file to check the host's outputs against."),
    outputs: Optional[Path] = typer.Option(None, "--outputs", metavar="HOST", help="The host's JSONL: one object per golden record, same order, with ids and probs (and normalized, tokens when it can)."),
    run: Optional[str] = typer.Option(None, "--run", metavar="PROGRAM", help="Instead of --outputs: run this program (danpack-run's interface with --tokens, e.g. runtime/native/danpack-run-native) on BUNDLE for each golden text."),
    show: int = typer.Option(10, "--show", min=0, metavar="N", help="How many differing records to print."),
) -> None:
    """Conformance records for a bundle (stress texts -> normalised text, tokens, ids, counts, probs, label),
    and the check of any host's outputs against them.

    Write the records: danpack golden BUNDLE -o golden.jsonl [--texts mine.txt]

    Check a host: danpack golden --verify golden.jsonl --outputs host.jsonl

    Check a program: danpack golden --verify golden.jsonl --run runtime/native/danpack-run-native BUNDLE

    The check prints the first differing records with their stage (normalisation, split, mapping, model) and
    exits 1 when any record differs (tokens or ids at all, probs by more than 1e-6), 0 when all agree,
    2 for unreadable or malformed input. The JSONL formats are in the README ("The golden kit").
    """
    if verify is not None or outputs is not None or run is not None:
        if verify is None or (outputs is None) == (run is None):
            fail("--verify GOLDEN goes with either --outputs HOST or --run PROGRAM BUNDLE; give one of them")
        if run is not None and bundle is None:
            fail("--run PROGRAM needs BUNDLE: the bundle the golden file was written for, which the program answers with")
        if output is not None or texts or (bundle is not None and run is None):
            fail("--verify checks a host's outputs; BUNDLE, --output and --texts belong to writing records "
                 "(BUNDLE also goes with --run PROGRAM)")
        _verify(verify, outputs, show, run, bundle)
        return
    if bundle is None or output is None:
        fail("give BUNDLE and --output FILE.jsonl to write records, or --verify GOLDEN --outputs HOST to check a host")
    _write(bundle, output, texts, text_field, backend)


def _write(bundle: Path, output: Path, texts: list[Path], text_field: str, backend: str) -> None:
    from danpack.files import check_outputs, write_atomic
    from danpack.golden.records import make_header, make_records, render_golden
    from danpack.golden.stress import stress_cases
    from danpack.runtime.classifier import load
    from danpack.textfile import format_warning, iter_records

    for path in texts:
        if path.is_file() and (warning := format_warning(path)):
            typer.echo(f"danpack: warning: {warning}", err=True)
    try:
        check_outputs({"--output": output}, {"BUNDLE": bundle, **{f"--texts {p}": p for p in texts}})
        extra = [r[text_field] for p in texts for r in iter_records(p, text_field)]
        classifier = load(bundle, backend=backend)
        cases = stress_cases(classifier.bundle.vocab, classifier.bundle.tokenizer, extra)
        records = make_records(classifier, cases)
        write_atomic(output, render_golden(make_header(classifier, len(records)), records))
    except DanpackError as e:
        fail(str(e))
    typer.echo(f"wrote {output}: {len(records)} records ({len(records) - len(extra)} stress and vocabulary texts, "
               f"{len(extra)} of yours) for bundle sha256 {classifier.bundle.sha256[:16]}…")


def _verify(golden: Path, outputs: Optional[Path], show: int, run: Optional[str], bundle: Optional[Path]) -> None:
    import shlex

    from danpack.golden.program import verify_program
    from danpack.golden.records import GoldenError, read_golden, read_jsonl
    from danpack.golden.verify import PROB_TOLERANCE, describe_difference, verify_outputs
    from danpack.runtime.bundle import read_bundle

    try:
        header, records = read_golden(golden)
        if run is not None:
            sha = read_bundle(bundle).sha256
            if sha != header.get("bundle_sha256"):
                raise GoldenError(f"{bundle}: bundle sha256 {sha[:16]}… is not the golden file's "
                                  f"({str(header.get('bundle_sha256'))[:16]}…); give the bundle the kit was written for")
            verdict, left_out = verify_program(shlex.split(run), bundle, header.get("labels") or [], records)
            if left_out:
                typer.echo(f"{left_out} record(s) holding NUL left out: the stream interface refuses NUL in a text")
        else:
            verdict = verify_outputs(records, read_jsonl(outputs, "host output file"), str(outputs))
    except DanpackError as e:
        fail(str(e))
    for d in verdict.differences[:show]:
        for line in describe_difference(d):
            typer.echo(line)
    stages = ", ".join(f"{stage} {n}" for stage, n in verdict.by_stage().items())
    typer.echo(f"{verdict.records} records, {len(verdict.differences)} differ{f' ({stages})' if stages else ''}; "
               f"largest probability difference where ids agree {verdict.worst_prob_diff:.2e} "
               f"(tolerance {PROB_TOLERANCE:g}); bundle sha256 {str(header.get('bundle_sha256'))[:16]}…")
    typer.echo("PASS" if verdict.passed else "FAIL")
    if not verdict.passed:
        raise typer.Exit(code=1)
