"""`danpack pack`, `danpack inspect`, `danpack export-onnx`."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer

from danpack.cli.common import echo, fail, interruptible, parse_share
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError
from danpack.units import format_bytes

# The library (numpy, onnx) is imported inside each command: `danpack --help` stays fast.


def _read_keep_words(path: Optional[Path]) -> tuple[str, ...]:
    if path is None:
        return ()
    try:
        return tuple(w.strip() for w in path.read_text(encoding="utf-8").splitlines() if w.strip())
    except (OSError, UnicodeDecodeError) as e:
        fail(f"{path}: cannot read keep-words ({e}); give a UTF-8 file with one token per line")


@app.command("pack", cls=PlainCommand,
             short_help="Pack a float model folder into one small int8 bundle.")
def pack_command(
    model_dir: Path = typer.Argument(..., metavar="MODEL_DIR", help="Float model directory (dan.json, tokens.txt, weights.npz or weights.safetensors)."),
    output: Path = typer.Option(..., "--output", "-o", metavar="FILE", help="Bundle file to write (replaced atomically)."),
    corpus: list[Path] = typer.Option([], "--corpus", "-c", metavar="FILE", help="Unlabelled deployment-domain texts (plain lines, .jsonl, .csv or .tsv); repeatable. Without one, every row the tokenizer can produce is kept."),
    text_field: Optional[str] = typer.Option(None, metavar="NAME", help="Field (JSONL) or column (CSV/TSV) holding the text [default: text]; needs such a corpus."),
    coverage: Optional[str] = typer.Option(None, metavar="SHARE", help="Keep the most frequent rows until this share of the known tokens of the selection texts (the corpus less its held-out slice) is covered: 0..1 or a percent such as 99.5%; only with a corpus. Default (none of --coverage, --top, --max-bytes, --target-agreement): the smallest bundle whose held-out agreement is within 0.1 pt of keeping every row."),
    top: Optional[int] = typer.Option(None, metavar="N", help="Keep exactly the N most frequent rows (keep-words count among them) instead of a coverage target; only with a corpus."),
    max_bytes: Optional[int] = typer.Option(None, metavar="BYTES", help="Keep the most rows whose whole bundle fits this many bytes (instead of --coverage or --top); only with a corpus."),
    target_agreement: Optional[str] = typer.Option(None, metavar="SHARE", help="The smallest bundle (rows x pruned policy x fold) that agrees with the float model on at least this share of the held-out corpus texts (by its 90% lower confidence bound): 0..1 or a percent such as 99.5%; exit 1 and no bundle when none does. Only with a corpus."),
    keep_words: Optional[Path] = typer.Option(None, metavar="FILE", help="File of tokens (one per line) always kept, e.g. negations; only with a corpus (without one every row is kept)."),
    pruned: str = typer.Option("auto", metavar="auto|skip|unk|rest", help="Run-time fate of pruned tokens: skip (left out of the mean), unk (the model's unknown row), rest (one row holding the mean of the pruned rows), auto (the one with the best held-out agreement; without a corpus: unk when the model has one, else skip)."),
    fold: str = typer.Option("auto", metavar="auto|yes|no", help="Fold the first hidden layer into the table (store each row already multiplied by that layer's weights, so the device skips one matrix product and the table gets narrower): auto (when the layer is narrower than the embedding; a measured search tries both), yes, no."),
    rank: str = typer.Option("frequency", metavar="frequency|effect", help="Row ranking: frequency (corpus count), or effect (count x how far the row moves the first layer); only with a corpus."),
    measure: bool = typer.Option(True, "--measure/--no-measure", help="Hold out about 1 in 7 corpus texts and choose by measurement (the default); --no-measure: rank on every text and use the fixed rules (coverage 0.995, policy unk when the model has one, else skip)."),
    token_sample: Optional[Path] = typer.Option(None, metavar="FILE", help="JSONL of {text, tokens|ids} from your own pipeline; danpack must reproduce every record before packing."),
    envelope_buckets: int = typer.Option(16, metavar="N", help="Split the envelope of what a token the bundle does not know may have done into N hash buckets (2 x table width bytes each; 0: one envelope); see the README's bound section."),
    absent_min_count: int = typer.Option(1, metavar="N", help="List the corpus tokens the float model never knew that occur at least N times (the 8,192 most frequent, as short hash fingerprints, under 2 bytes each), so texts holding them can be certified; 0: no list."),
    absent_spread: int = typer.Option(32, metavar="N", help="Fingerprint values per float token in that list: fingerprints get ceil(log2(N x float rows)) bits, at most 32 (larger N: fewer corpus tokens lost to a float token's fingerprint, about 1 in N, and about one bit more per listed token for each doubling)."),
    outlier_tail: float = typer.Option(0.0001, metavar="SHARE", help="Set apart the float rows beyond this quantile at either end of any table coordinate (the few that widen the envelope most): the buckets then bound the other rows, and a filter of the set-apart rows' tokens sends those tokens to the one envelope; 0: no filter."),
    outlier_bits: int = typer.Option(5, metavar="N", help="Filter bits per set-apart row (more bits: fewer tokens wrongly sent to the one envelope, about 0.6^N of them)."),
    json_out: bool = typer.Option(False, "--json", help="Print the summary as JSON on stdout."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress on stderr."),
) -> None:
    """Prune, quantise (int8, per-row scale), fold and export a float DAN into one bundle."""
    from danpack.files import check_outputs
    from danpack.model import model_files
    from danpack.pack.build import PackOptions, TargetError, pack_model
    from danpack.pack.envelope import EnvelopeOptions
    from danpack.progress import Steps
    from danpack.textfile import detect_format, format_warning

    chosen = [name for name, value in (("--coverage", coverage), ("--top", top), ("--max-bytes", max_bytes),
                                       ("--target-agreement", target_agreement)) if value is not None]
    if len(chosen) > 1:
        fail(f"{' and '.join(chosen)} each choose how many rows to keep; give one of them")
    idle = chosen + (["--keep-words"] if keep_words is not None else [])
    if idle and not corpus:  # without a corpus every reachable row is kept: these would do nothing
        fail(f"{' and '.join(idle)} {'chooses' if len(idle) == 1 else 'choose'} rows by their use in a corpus; "
             "add --corpus FILE (deployment-domain texts), or drop the option to keep every row")
    if text_field is not None and corpus and all(detect_format(p) == "lines" for p in corpus if p.is_file()):
        fail(f"--text-field {text_field!r} names a JSONL field or CSV/TSV column, but every --corpus is plain lines; "
             "drop --text-field, or give a .jsonl / .csv / .tsv corpus")
    for path in corpus:
        if path.is_file() and (warning := format_warning(path)):
            echo(f"danpack: warning: {warning}", err=True)
    try:
        check_outputs({"--output": output}, {**{f"model file {n}": p for n, p in model_files(model_dir).items()},
                                             **{f"--corpus {p}": p for p in corpus}, "--keep-words": keep_words,
                                             "--token-sample": token_sample})
        sample = None
        if token_sample is not None:
            from danpack.model import load_model
            from danpack.pipeline import check_token_sample

            sample = check_token_sample(token_sample, load_model(model_dir), style="model")
        options = PackOptions(corpora=tuple(str(p) for p in corpus), text_field=text_field or "text",
                              coverage=None if coverage is None else parse_share(coverage, "--coverage"), top=top,
                              max_bytes=max_bytes,
                              target_agreement=None if target_agreement is None else parse_share(target_agreement,
                                                                                                  "--target-agreement"),
                              keep_words=_read_keep_words(keep_words), pruned=pruned, fold=fold, rank=rank,
                              measure=measure, envelope=EnvelopeOptions(buckets=envelope_buckets,
                                                                        absent_min_count=absent_min_count,
                                                                        absent_spread=absent_spread,
                                                                        outlier_tail=outlier_tail,
                                                                        outlier_bits=outlier_bits))
        steps = Steps(5 + (bool(corpus) and measure) + (max_bytes is not None and not (corpus and measure)),
                      quiet=quiet or json_out)
        with interruptible(f"nothing was written ({output} is as it was)"):
            result = pack_model(model_dir, output, options, steps)
    except TargetError as e:  # a finding, not bad input
        fail(str(e), code=1)
    except DanpackError as e:
        fail(str(e))
    plan = result.plan
    summary = {
        "bundle": str(result.path), "bytes": result.bytes, "float_bytes": result.source_bytes,
        "ratio": round(result.source_bytes / result.bytes, 2),
        "rows_kept": int(plan.keep), "rows_float": result.source_rows, "table_rows": result.rows, "table_width": result.width,
        "coverage": round(plan.coverage, 6), "corpus_texts": plan.corpus_texts + result.heldout_texts,
        "selection_texts": plan.corpus_texts, "heldout_texts": result.heldout_texts, "corpus_tokens": plan.corpus_tokens,
        "unreachable_rows": plan.unreachable, "unreachable_examples": list(plan.unreachable_examples),
        "unknown_keep_words": list(plan.unknown_keep_words), "pruned_policy": result.policy, "folded": result.folded,
        "breakdown": result.breakdown, "choice": result.choice,
        "heldout": None if result.heldout is None else result.heldout.to_dict(),
        "token_sample": None if sample is None else {"path": sample.path, "records": sample.records},
    }
    if json_out:
        echo(json.dumps(summary, indent=2, ensure_ascii=False))
        return
    if sample is not None:
        echo(sample.describe())
    echo(f"wrote {result.path}: {format_bytes(result.bytes)} "
               f"(float model {format_bytes(result.source_bytes)}, {summary['ratio']}x smaller)")
    if plan.has_corpus:
        echo(f"kept {plan.keep:,} of {result.source_rows:,} rows, covering {plan.coverage:.2%} of the "
                   f"{plan.known_tokens:,} known tokens in {plan.corpus_texts:,} selection texts "
                   f"({result.heldout_texts:,} more held out for measurement); chosen by {result.choice}")
        if result.heldout is not None:
            h = result.heldout
            echo(f"held-out: agreement with the float model {h.agreement:.2%}, mean |dp| {h.mean_abs_prob_diff:.4f}, "
                       f"certified {h.certified_share:.2%} of {h.texts:,} texts")
    else:
        echo(f"no corpus given: kept every reachable row ({plan.keep:,} of {result.source_rows:,}); "
                   "quantisation only — pass --corpus to prune to the deployment vocabulary")
    if plan.unreachable:
        echo(f"dropped {plan.unreachable:,} rows the tokenizer can never produce, e.g. "
                   + ", ".join(repr(t) for t in plan.unreachable_examples[:5]))
    if plan.unknown_keep_words:
        echo(f"keep-words the float model does not know (not added): {', '.join(plan.unknown_keep_words[:10])}")
    echo(f"table {result.rows:,} x {result.width} int8{' (first hidden layer folded in)' if result.folded else ''}; "
               f"pruned tokens at run time: {result.policy}")
    echo("bytes: " + ", ".join(f"{k} {format_bytes(v)} ({v / result.bytes:.1%})" for k, v in result.breakdown.items()))


@app.command("inspect", cls=PlainCommand,
             short_help="Show a bundle's manifest, checksum and where its bytes go.")
def inspect_command(
    bundle: Path = typer.Argument(..., metavar="BUNDLE", help="Bundle file written by `danpack pack`."),
    json_out: bool = typer.Option(False, "--json", help="Print everything as JSON."),
    vocab: bool = typer.Option(False, "--vocab", help="With --json: add \"vocab\", the tokens in row order (element i is row i)."),
) -> None:
    """Show a bundle's manifest, checksum and where its bytes go."""
    from danpack.check.bound import describe_bound
    from danpack.pack.inspect import describe_bundle
    from danpack.runtime.bundle import read_bundle

    try:
        if vocab and not json_out:
            fail("--vocab prints the tokens inside the JSON description; add --json")
        info = describe_bundle(read_bundle(bundle), vocab=vocab)
    except DanpackError as e:
        fail(str(e))
    if json_out:
        echo(json.dumps(info, indent=2, ensure_ascii=False))
        return
    m = info["manifest"]
    echo(f"bundle   {bundle}")
    echo(f"sha256   {info['sha256']}")
    echo(f"size     {format_bytes(info['bytes'])} ({info['bytes']:,} bytes)")
    echo(f"labels   {', '.join(info['labels'])}")
    t = m["table"]
    echo(f"table    {t['rows']:,} x {t['width']} {t['dtype']}, {info['tokens']:,} tokens"
               f"{', first hidden layer folded in' if t['folded'] else ''}")
    echo("layers   " + " -> ".join(  # a folded layer lives in the table: the device skips its matrix product
        f"{'folded into the table' if not l['weight'] else 'dense'} + {l['activation'] or 'softmax'}" for l in m["layers"]))
    echo(f"pruned   {m['oov']['policy']}; coverage {m['selection']['coverage']:.2%}")
    held = m["selection"].get("heldout")
    if isinstance(held, dict):
        echo(f"heldout  agreement {held['agreement']:.2%}, mean |dp| {held['mean_abs_prob_diff']:.4f}, certified "
                   f"{held['certified_share']:.2%} of {held['texts']:,} texts; chosen by {m['selection'].get('choice')}")
    echo(f"source   {m['source']['rows']:,} rows x {m['source']['embedding_dim']}, "
               f"{format_bytes(m['source']['bytes'])}, sha256 {m['source']['sha256'][:16]}…")
    echo(f"packer   {m['packer']}")
    echo("bytes    " + ", ".join(f"{k} {format_bytes(v)} ({v / info['bytes']:.1%})" for k, v in info["breakdown"].items()))
    if "drift_bound" in info:
        for line in describe_bound(info["drift_bound"]):
            echo(f"bound    {line}")


@app.command("export-onnx", cls=PlainCommand,
             short_help="Write a self-contained ONNX file for hosts in other languages.")
def export_onnx_command(
    bundle: Path = typer.Argument(..., metavar="BUNDLE", help="Bundle file written by `danpack pack`."),
    output: Path = typer.Option(..., "--output", "-o", metavar="FILE", help="Self-contained .onnx file to write."),
) -> None:
    """Write the bundle's graph with its tensors embedded, for hosts in other languages.

    The file describes itself: its ONNX metadata_props hold, under keys starting "danpack.", the labels in
    output order, the tokenizer spec (normalisation, case, preset name and full pattern, max_tokens, Unicode
    version and the table of code points unassigned in it), the unknown-word policy and row, the vocabulary
    (element i is row i), the bundle's sha256 and format versions.

    A host's steps, in order: pin Unicode (unassigned code points -> space), normalise, case, split with
    the pattern, keep the first max_tokens tokens, map tokens to rows (unknown -> the oov row, or dropped
    for "skip"), pad ids with 0 and pass counts, run, read probs (columns in label order).
    Inputs: ids (batch, tokens) int64, counts (batch,) int64. Outputs: probs, logits (batch, labels).
    README "Running the exported ONNX on another host" details each key; `danpack golden` checks a port.
    """
    from danpack.files import check_outputs, write_atomic
    from danpack.pack.inspect import export_onnx
    from danpack.runtime.bundle import read_bundle

    try:
        check_outputs({"--output": output}, {"BUNDLE": bundle})
        with interruptible(f"nothing was written ({output} is as it was)"):
            write_atomic(output, export_onnx(read_bundle(bundle)).SerializeToString())
    except DanpackError as e:
        fail(str(e))
    echo(f"wrote {output} ({format_bytes(output.stat().st_size)})")
