"""The user's text pipeline: tokenizer + unknown-word policy, proved against their own tokens.

A float model states how text becomes rows (a `TokenizerSpec` and an OOV policy). When that
statement differs from the user's training pipeline, danpack's float reading and the bundle share
the error and a check against the float reading cannot see it. This module
- finds the vocabulary's unknown-word token (`find_unk_token`),
- reads a token sample (JSONL records of `text` and the `tokens` or `ids` the user's own pipeline
  produced) and requires danpack to reproduce every record (`check_token_sample`),
- lists the pipelines danpack could have been told instead (`candidate_pipelines`), so a mismatch
  names the option that fixes it.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from danpack.model import FloatModel
from danpack.runtime.encode import Encoder
from danpack.runtime.errors import DanpackError
from danpack.runtime.tokenize import CASES, NORMALIZATIONS, PRESETS, Tokenizer, TokenizerSpec
from danpack.textfile import iter_numbered_records

# Spellings of an unknown-word token in common vocabularies (torchtext, BERT-style, Keras-style; from memory),
# in the order they are looked for.
UNK_TOKENS = ("<unk>", "[UNK]", "<UNK>", "<oov>", "<OOV>", "[OOV]", "[unk]", "<Unk>", "<unknown>", "__unk__",
              "__UNK__", "UNK", "OOV")
SHOWN_MISMATCHES = 3  # records listed side by side in a mismatch message
TOKENS_SHOWN = 24  # tokens of each list shown per record


class TokenSampleError(DanpackError):
    """A token sample that cannot be read, or that danpack does not reproduce."""


def find_unk_token(vocab: Sequence[str]) -> str | None:
    """The vocabulary's unknown-word token under a usual spelling, or None."""
    present = set(vocab)
    return next((t for t in UNK_TOKENS if t in present), None)


@dataclass(frozen=True)
class Pipeline:
    """How text becomes rows of the model's vocabulary."""

    tokenizer: TokenizerSpec
    oov_policy: str  # "skip" or "unk"
    unk_token: str | None  # the unknown-word row's token under "unk"

    @classmethod
    def of(cls, model: FloatModel) -> "Pipeline":
        return cls(model.tokenizer, model.oov_policy, model.unk_token if model.oov_policy == "unk" else None)

    def encoder(self, vocab: Sequence[str]) -> Encoder:
        oov_id = list(vocab).index(self.unk_token) if self.oov_policy == "unk" else None
        return Encoder(Tokenizer(self.tokenizer), vocab, oov_id)

    def apply(self, model: FloatModel) -> FloatModel:
        """The model with this pipeline instead of its own (same weights)."""
        return dataclasses.replace(model, tokenizer=self.tokenizer, oov_policy=self.oov_policy,
                                   unk_token=self.unk_token)

    def describe(self) -> str:
        t = self.tokenizer
        oov = "skip" if self.oov_policy == "skip" else f"unk {self.unk_token!r}"
        return (f"pattern {t.pattern if t.pattern in PRESETS else repr(t.pattern)}, case {t.case}, "
                f"normalization {t.normalization}, max tokens {t.max_tokens}, unknown words {oov}")

    def changes_from(self, other: "Pipeline") -> list[str]:
        """convert-torch options that turn `other` into this pipeline (empty when they are the same)."""
        a, b, out = self.tokenizer, other.tokenizer, []
        if a.pattern != b.pattern:
            out.append(f"--pattern {a.pattern if a.pattern in PRESETS else repr(a.pattern)}")
        if a.case != b.case:
            out.append(f"--case {a.case}")
        if a.normalization != b.normalization:
            out.append(f"--normalization {a.normalization}")
        if a.max_tokens != b.max_tokens:
            out.append(f"--max-tokens {a.max_tokens}")
        if (self.oov_policy, self.unk_token) != (other.oov_policy, other.unk_token):
            out.append("--oov skip" if self.oov_policy == "skip" else f"--oov unk --unk-token {self.unk_token}")
        return out


def candidate_pipelines(current: Pipeline, vocab: Sequence[str], vary_oov: bool = True,
                        max_tokens: int | None = None) -> list[Pipeline]:
    """Pipelines danpack can be told: every preset x case x normalization (and the current pattern),
    with each unknown-word policy the vocabulary allows; fewest changes from `current` first."""
    patterns = list(dict.fromkeys([current.tokenizer.pattern, *PRESETS]))
    # ties are broken in this order: the current value, then what a plain training script does
    cases = list(dict.fromkeys([current.tokenizer.case, "lower", "keep", *CASES]))
    forms = list(dict.fromkeys([current.tokenizer.normalization, "none", *NORMALIZATIONS]))
    cap = max(current.tokenizer.max_tokens, max_tokens or 0)
    specs = [TokenizerSpec(normalization=n, case=c, pattern=p, max_tokens=cap)
             for p in patterns for c in cases for n in forms]
    oovs = [(current.oov_policy, current.unk_token)]
    if vary_oov:
        oovs += [("skip", None)] + [("unk", t) for t in UNK_TOKENS if t in set(vocab)]
    found = [Pipeline(s, p, u) for s in specs for p, u in dict.fromkeys(oovs)]
    return sorted(found, key=lambda c: len(c.changes_from(current)))


# ---- token samples ---------------------------------------------------------------------------

@dataclass(frozen=True)
class SampleRecord:
    """One record of a token sample: the text and what the user's own pipeline made of it."""

    line: int
    text: str
    tokens: tuple[str, ...] | None  # the user's tokens (before the vocabulary), or
    ids: tuple[int, ...] | None  # rows of the user's vocabulary (the checkpoint's table, padding row included)


def read_token_sample(path: str | os.PathLike) -> tuple[SampleRecord, ...]:
    """JSONL records {"text": ..., "tokens": [...]} or {"text": ..., "ids": [...]}; bad records -> exit 2."""
    path = Path(path)
    out = []
    for line, record in iter_numbered_records(path, "text", fmt="jsonl"):
        tokens, ids = record.get("tokens"), record.get("ids")
        if (tokens is None) == (ids is None):
            raise TokenSampleError(f"{path}:{line}: give either 'tokens' (a list of strings) or 'ids' (a list of "
                                   f"vocabulary rows) beside 'text'; fields present: {sorted(record)}")
        if tokens is not None:
            if not isinstance(tokens, list) or not all(isinstance(t, str) for t in tokens):
                raise TokenSampleError(f"{path}:{line}: 'tokens' must be a list of strings, found {tokens!r:.80}")
            out.append(SampleRecord(line, record["text"], tuple(tokens), None))
        else:
            if not isinstance(ids, list) or not all(isinstance(i, int) and not isinstance(i, bool) and i >= 0
                                                    for i in ids):
                raise TokenSampleError(f"{path}:{line}: 'ids' must be a list of row numbers >= 0, "
                                       f"found {ids!r:.80}")
            out.append(SampleRecord(line, record["text"], None, tuple(ids)))
    if not out:
        raise TokenSampleError(f"{path}: holds no records; write one JSON object per line with 'text' and "
                               "'tokens' or 'ids'")
    return tuple(out)


def user_rows(model: FloatModel) -> tuple[list[int], set[int]]:
    """(user row of each danpack row, dropped user rows): convert-torch may drop a padding row, so row i of
    the user's table is not always row i of the float model. Read from the conversion record in dan.json."""
    dropped = {int(d["row"]) for d in (model.metadata.get("converted_from") or {}).get("dropped_rows", [])}
    total = len(model.vocab) + len(dropped)
    return [r for r in range(total) if r not in dropped], dropped


@dataclass(frozen=True)
class SampleCheck:
    """A token sample reproduced: how many records and which kind."""

    path: str
    records: int
    kind: str  # "tokens", "ids" or "tokens and ids"

    def describe(self) -> str:
        return f"token sample {self.path}: danpack reproduces all {self.records:,} records ({self.kind})"


class _Expected:
    """Each record's expected tokens or danpack rows, in danpack's terms."""

    def __init__(self, path: Path, records: Sequence[SampleRecord], vocab: Sequence[str], kept: Sequence[int],
                 dropped: set[int]) -> None:
        to_ours = {user: ours for ours, user in enumerate(kept)}
        self.values: list[tuple[str, ...] | tuple[int, ...]] = []
        for r in records:
            if r.tokens is not None:
                self.values.append(r.tokens)
                continue
            bad = [i for i in r.ids if i not in to_ours and i not in dropped]
            if bad:
                raise TokenSampleError(f"{path}:{r.line}: id {bad[0]} is not a row of the vocabulary "
                                       f"({len(kept) + len(dropped)} rows, 0..{len(kept) + len(dropped) - 1}); "
                                       "the sample must come from the same vocabulary as the checkpoint")
            self.values.append(tuple(to_ours[i] for i in r.ids if i not in dropped))  # padding ids left out


def _reproduce(records: Sequence[SampleRecord], expected: _Expected, pipeline: Pipeline,
               vocab: Sequence[str], first_only: bool = False) -> list[int]:
    """Indexes of records `pipeline` does not reproduce (only the first with `first_only`: a candidate is
    ruled out at its first miss, so trying every candidate on a large sample stays cheap)."""
    encoder = pipeline.encoder(vocab)
    bad = []
    for i, (r, want) in enumerate(zip(records, expected.values)):
        tokens = encoder.tokenizer.tokenize(r.text)
        got = tuple(tokens) if r.tokens is not None else tuple(encoder.map_tokens(tokens))
        if got != want:
            bad.append(i)
            if first_only:
                break
    return bad


def first_difference(a: Sequence, b: Sequence) -> int:
    """Index of the first position where two token lists differ (the shorter length when one is a prefix)."""
    return next((i for i, (x, y) in enumerate(zip(a, b)) if x != y), min(len(a), len(b)))


def show_tokens(values: Sequence, start: int = 0, vocab: Sequence[str] | None = None,
                width: int = TOKENS_SHOWN) -> str:
    """A token list from `start` (a few tokens before the first difference), rows shown as their tokens."""
    start = max(0, start - 3)
    items = [repr(vocab[v]) if vocab is not None else repr(v) for v in values[start:start + width]]
    return ("[..., " if start else "[") + ", ".join(items) + (", ...]" if len(values) > start + width else "]")


def check_token_sample(path: str | os.PathLike, model: FloatModel, kept: Sequence[int] | None = None,
                       dropped: set[int] | None = None, style: str = "convert") -> SampleCheck:
    """Require `model`'s pipeline to reproduce every record of the sample at `path`.

    `kept[i]` is the user's row of danpack row i and `dropped` the user's rows danpack dropped (padding);
    by default both come from the model's conversion record. On a mismatch the error lists the first few
    records side by side and the options that would make every record match, when some would.
    `style` words the fix for "convert" (convert-torch options) or "model" (a float model already written).
    """
    path = Path(path)
    records = read_token_sample(path)
    if kept is None:
        kept, dropped = user_rows(model)
    expected = _Expected(path, records, model.vocab, kept, dropped or set())
    current = Pipeline.of(model)
    bad = _reproduce(records, expected, current, model.vocab)
    has_ids = any(r.ids is not None for r in records)
    kind = " and ".join(k for k, on in (("tokens", any(r.tokens is not None for r in records)),
                                        ("ids", has_ids)) if on)
    if not bad:
        return SampleCheck(str(path), len(records), kind)
    raise TokenSampleError(_mismatch_message(path, records, expected, bad, model, current, has_ids, style))


def _mismatch_message(path: Path, records, expected: _Expected, bad: list[int], model: FloatModel,
                      current: Pipeline, has_ids: bool, style: str) -> str:
    encoder = current.encoder(model.vocab)
    lines = [f"{path}: danpack does not reproduce {len(bad):,} of {len(records):,} records of the token sample "
             f"with {current.describe()}; the first {min(len(bad), SHOWN_MISMATCHES)}:"]
    for i in bad[:SHOWN_MISMATCHES]:
        r, want = records[i], expected.values[i]
        tokens = encoder.tokenizer.tokenize(r.text)
        as_rows = r.ids is not None
        got = encoder.map_tokens(tokens) if as_rows else tokens
        at, vocab = first_difference(want, got), model.vocab if as_rows else None
        lines.append(f"  line {r.line}: {r.text[:100]!r} (first difference at token {at + 1})")
        lines.append(f"    yours:   {show_tokens(want, at, vocab)}")
        lines.append(f"    danpack: {show_tokens(got, at, vocab)}")
    longest = max(len(v) for v in expected.values)
    fixes = [c for c in candidate_pipelines(current, model.vocab, vary_oov=has_ids, max_tokens=longest)
             if c != current and not _reproduce(records, expected, c, model.vocab, first_only=True)]
    if fixes:
        flags = " ".join(fixes[0].changes_from(current))
        if style == "convert":
            lines.append(f"fix: pass {flags}: with it danpack reproduces every record")
        else:
            lines.append(f"fix: convert the model again with {flags} (or set those fields of 'tokenizer' / 'oov' "
                         "in dan.json): with it danpack reproduces every record")
    else:
        lines.append("no preset, case, normalization or unknown-word policy reproduces every record; declare the "
                     "pipeline's token pattern with --pattern REGEX (each match is a token)")
    return "\n".join(lines)
