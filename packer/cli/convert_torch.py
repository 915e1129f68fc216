"""`danpack convert-torch`: a PyTorch DAN state_dict -> float model directory (thin wrapper)."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Optional

import typer

from danpack.cli.common import echo, fail, interruptible
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError
from danpack.units import format_bytes

if TYPE_CHECKING:
    from danpack.convert.from_torch import ConversionReport
# The library (numpy, torch) is imported inside the command: `danpack --help` stays fast.


def _padding(value: str) -> tuple[int | None, bool]:
    """--padding-row: 'auto' (detect), 'none' (keep every row) or a row number -> (row, detect)."""
    if value == "auto":
        return None, True
    if value == "none":
        return None, False
    try:
        return int(value), False
    except ValueError:
        raise DanpackError(f"--padding-row {value!r}: expected a row number, 'auto' or 'none'") from None


def _describe(report: ConversionReport) -> list[str]:
    """The summary printed on stdout: what was found, how it maps, what was written."""
    ck, lines = report.checkpoint, []
    kind = "PyTorch state_dict" if ck.kind == "torch" else "safetensors"
    lines.append(f"checkpoint  {ck.path} ({kind}, {len(ck.keys)} tensors)")
    mapped = {key: ours for ours, key, _ in report.mapping}
    width = max(len(k) for k in ck.keys)
    lines.append("tensors found:")
    for key in ck.keys:
        target = mapped.get(key) or ("(ignored on request)" if key in report.layout.ignored else "")
        shape = "x".join(str(s) for s in ck.shapes[key]) or "scalar"
        lines.append(f"  {key:<{width}}  {shape:<12} {ck.dtypes[key]:<9} -> {target}")
    for ours, key, _ in report.mapping:
        if key not in ck.shapes:
            lines.append(f"  {'':<{width}}  {'':<12} {'':<9}    {ours}: {key}")
    hidden = " -> ".join(str(h) for h in report.hidden_sizes)
    stack = f"hidden {hidden} ({report.activation}) -> " if report.hidden_sizes else ""
    lines.append(f"layers      embedding {report.vocab_size}x{report.embedding_dim} -> {stack}output {len(report.labels)}")
    lines.append(f"rows        table {report.table_rows}, vocabulary {report.vocab_size}, dropped {len(report.dropped)}")
    for d in report.dropped:
        token = "no token" if d.token is None else repr(d.token)
        lines.append(f"  dropped row {d.row} ({token}): {d.reason}")
    lines.append(f"labels      {len(report.labels)}: {', '.join(report.labels)}")
    t = report.tokenizer
    if t is not None:
        lines.append(f"tokenizer   pattern {t.pattern}, case {t.case}, normalization {t.normalization}, "
                     f"max tokens {t.max_tokens}")
    lines.append(f"unknown     {report.oov_choice}")
    lines.append(f"sample      {report.token_sample.removeprefix('token sample ')}" if report.token_sample else
                 "sample      none given: pass --token-sample FILE (texts and your pipeline's tokens or ids) "
                 "to prove the tokenizer matches your training")
    lines.append(f"wrote       {report.output_dir} (weights.{report.weights_format}, {format_bytes(report.bytes_written)}), "
                 "re-loaded and validated")
    return lines


@app.command("convert-torch", cls=PlainCommand,
             short_help="Turn a PyTorch DAN state_dict into a float model folder.")
def convert_torch(
    checkpoint: Path = typer.Argument(..., metavar="CHECKPOINT", help="state_dict saved with torch.save, or a .safetensors file of it."),
    vocab: Path = typer.Option(..., "--vocab", metavar="FILE", help="One token per line (line i = row i), or JSON list / token->row map."),
    labels: str = typer.Option(..., "--labels", metavar="FILE|A,B,...", help="File with one label per line, or a comma-separated list."),
    output: Path = typer.Option(..., "-o", "--output", metavar="MODEL_DIR", help="Model directory to write."),
    activation: Optional[str] = typer.Option(None, "--activation", metavar="relu|tanh", help="relu or tanh (needed when there are hidden layers)."),
    bag_mode: str = typer.Option("mean", "--bag-mode", metavar="mean|sum|max", help="nn.EmbeddingBag mode the model used: mean|sum|max."),
    embedding_key: Optional[str] = typer.Option(None, "--embedding-key", metavar="KEY", help="The embedding table's key (when ambiguous)."),
    layer_keys: Optional[str] = typer.Option(None, "--layer-keys", metavar="KEY,KEY,...", help="Linear layers in forward order, comma-separated."),
    ignore_key: list[str] = typer.Option([], "--ignore-key", metavar="KEY", help="A tensor or module prefix the model does not use."),
    state_key: Optional[str] = typer.Option(None, "--state-key", metavar="KEY", help="Entry holding the state_dict in a training checkpoint."),
    padding_row: str = typer.Option("auto", "--padding-row", metavar="N|auto|none", help="Row to drop as padding: N, 'auto' or 'none'."),
    pattern: str = typer.Option("words-v1", "--pattern", metavar="PRESET|REGEX", help="Token pattern: a preset (words-v1, spaces-v1 = \\S+, wordpunct-v1 = \\w+|[^\\w\\s]) or a regex, each match a token."),
    normalization: str = typer.Option("NFKC", "--normalization", metavar="NFKC|NFC|NFKD|NFD|none", help="Tokenizer Unicode form: NFC|NFKC|NFD|NFKD|none."),
    case: str = typer.Option("lower", "--case", metavar="lower|casefold|keep", help="Tokenizer case: lower|casefold|keep."),
    max_tokens: int = typer.Option(512, "--max-tokens", metavar="N", help="Tokens kept per text."),
    oov: str = typer.Option("auto", "--oov", metavar="auto|skip|unk", help="Unknown tokens: auto (unk when the vocabulary has <unk>, [UNK], <oov>, ...; else skip), skip (leave the mean) or unk."),
    unk_token: Optional[str] = typer.Option(None, "--unk-token", metavar="TOKEN", help="Vocabulary token for unknown words [default: the usual spelling found]."),
    token_sample: Optional[Path] = typer.Option(None, "--token-sample", metavar="FILE", help="JSONL of {text, tokens|ids} from your own pipeline; danpack must reproduce every record."),
    weights_format: str = typer.Option("npz", "--weights-format", metavar="npz|safetensors", help="npz or safetensors."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing model directory."),
) -> None:
    """Convert a PyTorch-trained DAN (state_dict) into a float model directory."""
    from danpack.convert.from_torch import ConvertOptions, convert_checkpoint
    from danpack.runtime.tokenize import TokenizerSpec

    try:
        row, detect = _padding(padding_row)
        options = ConvertOptions(
            activation=activation,
            bag_mode=bag_mode,
            embedding_key=embedding_key,
            layer_keys=tuple(k.strip() for k in layer_keys.split(",") if k.strip()) if layer_keys else None,
            ignore_keys=tuple(ignore_key),
            state_key=state_key,
            padding_row=row,
            detect_padding=detect,
            tokenizer=TokenizerSpec(normalization=normalization, case=case, pattern=pattern, max_tokens=max_tokens),
            oov_policy=oov,
            unk_token=unk_token,
            token_sample=None if token_sample is None else str(token_sample),
            weights_format=weights_format,
        )
        with interruptible(f"nothing was written ({output} is as it was)"):
            report = convert_checkpoint(checkpoint, vocab, labels, output, options, overwrite=overwrite)
    except DanpackError as e:
        fail(str(e))
    for note in report.warnings:
        echo(f"danpack: note: {note}", err=True)
    echo("\n".join(_describe(report)))
