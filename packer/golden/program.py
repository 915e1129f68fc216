"""A program as the host: the golden kit's texts fed to a command with danpack-run's stream interface.

The program (e.g. runtime/native/danpack-run-native) is run twice on the records' texts as JSONL: with `--tokens`
(one {"tokens", "ids"} record per text; id -1 marks an unknown token the bundle's "skip" policy leaves out) and
with `--classify-empty` (one {"probs": {label: p}, "label"} record per text). Their records become the host outputs
`verify_outputs` compares. The stream interface takes UTF-8 only, so a record written from invalid bytes
("utf8_hex") is fed as its decoded text (U+FFFD for each bad sequence), as a host decodes its input; and it refuses
a text holding NUL (an error record), so such records (the kit's "controls" case) are left out and counted.
"""

from __future__ import annotations

import json
import subprocess
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

from .records import GoldenError
from .verify import Verdict, verify_outputs

TIMEOUT_SECONDS = 600


def _run(command: Sequence[str], args: list[str], data: bytes, count: int) -> list[dict]:
    """The program's output records for `data` (count JSONL texts); a failure is a GoldenError naming the program."""
    shown = " ".join(command)
    try:
        run = subprocess.run([*command, *args], input=data, capture_output=True, timeout=TIMEOUT_SECONDS)
    except (OSError, ValueError) as e:
        raise GoldenError(f"cannot run the program {shown!r} ({e}); give the path of an executable with --run") from None
    except subprocess.TimeoutExpired:
        raise GoldenError(f"the program {shown!r} did not answer {count} texts within {TIMEOUT_SECONDS} s") from None
    if run.returncode != 0:
        last = (run.stderr.decode("utf-8", "replace").strip().splitlines() or ["no message"])[-1]
        raise GoldenError(f"the program {shown!r} exited with status {run.returncode} ({last[:300]})")
    try:
        out = [json.loads(line) for line in run.stdout.splitlines()]
    except (UnicodeDecodeError, json.JSONDecodeError) as e:
        raise GoldenError(f"the program {shown!r} wrote a line that is not JSON ({e}); it must write danpack-run's "
                          "JSONL records") from None
    if len(out) != count or not all(isinstance(r, dict) for r in out):
        raise GoldenError(f"the program {shown!r} wrote {len(out)} records for {count} texts; it must answer each "
                          "input record with one output record, in order")
    for i, r in enumerate(out):
        if "error" in r:
            raise GoldenError(f"the program {shown!r} answered record {i} with an error record ({str(r['error'])[:200]})")
    return out


def program_outputs(command: Sequence[str], bundle: str | Path, labels: Sequence[str],
                    records: Sequence[dict]) -> list[dict]:
    """Host outputs (n, tokens, ids, probs in label order, label) of `command` run on `bundle` for each record."""
    data = "".join(json.dumps({"text": r["text"]}) + "\n" for r in records).encode("ascii")
    tokens = _run(command, ["--jsonl", "--tokens", str(bundle)], data, len(records))
    answers = _run(command, ["--jsonl", "--classify-empty", str(bundle)], data, len(records))
    outputs = []
    for n, (t, a) in enumerate(zip(tokens, answers)):
        probs = a.get("probs")
        if not isinstance(t.get("ids"), list) or not isinstance(probs, dict) or set(probs) != set(labels):
            raise GoldenError(f"the program {' '.join(command)!r} answered record {n} without ids, or without one "
                              f"probability per label of the golden file ({', '.join(labels)})")
        outputs.append({"n": n, "tokens": t.get("tokens"), "ids": [i for i in t["ids"] if not (isinstance(i, int) and i < 0)],
                        "probs": [probs[label] for label in labels], "label": a.get("label")})
    return outputs


def verify_program(command: Sequence[str], bundle: str | Path, labels: Sequence[str],
                   records: Sequence[dict]) -> tuple[Verdict, int]:
    """(verdict over the records the stream interface carries, numbered as in the golden file; records left out)."""
    kept = [i for i, r in enumerate(records) if "\x00" not in r["text"]]
    outputs = program_outputs(command, bundle, labels, [records[i] for i in kept])
    for out in outputs:
        out.pop("n")  # numbered among the kept records: the verdict is renumbered below
    verdict = verify_outputs([records[i] for i in kept], outputs, " ".join(command))
    differences = tuple(replace(d, index=kept[d.index]) for d in verdict.differences)
    return Verdict(verdict.records, differences, verdict.worst_prob_diff), len(records) - len(kept)
