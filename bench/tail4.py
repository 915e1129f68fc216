"""`python -m bench.tail4`: would 4-bit rows for the rarely used tail move the frontier? (a measurement, not a feature)

For each model of bench/measured.py: the int8 frontier (rows kept, skip policy, folded as packed) against
bundles whose last `share` of the kept rows (the least frequent) hold 4-bit values: per-row symmetric scale
max|row| / 7, q = round-half-to-even(x / scale) in [-7, 7] — two values per byte in a real bundle, so each
such row saves width / 2 bytes. Measured exactly as a candidate (heldout.py) with those rows' int8 codes and
scales replaced by the 4-bit ones (q·scale is the value the device would compute; the drift bound then uses
the coarser step). Ship criterion (issue 14): at least 1.3x fewer bytes at equal held-out agreement.
"""

from __future__ import annotations

import argparse
from dataclasses import replace
from pathlib import Path

import numpy as np

from danpack.pack.build import PackOptions, prepare_pack
from danpack.pack.choose import grid_keeps
from danpack.pack.heldout import Candidate, HeldOut
from danpack.progress import Steps

from .config import DEFAULT_WORK, BenchConfig
from .measured import subjects

SHARES = (0.5, 0.75, 0.9)  # share of the kept rows (the least frequent) held at 4 bits


def quantize4(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(n, W) float32 -> ((n, W) int8 codes in [-7, 7], (n,) float32 scales)."""
    scale = (np.abs(rows).max(axis=1) / np.float32(7)).astype(np.float32)  # (n,)
    safe = np.where(scale > 0, scale, np.float32(1))[:, None]
    return np.clip(np.rint(rows / safe), -7, 7).astype(np.int8), scale


def frontier_points(subject) -> dict:
    prep = prepare_pack(subject.model_dir, PackOptions(corpora=(str(subject.corpus),)), Steps(3, quiet=True))
    held = HeldOut(prep.model, prep.plan, prep.heldout_texts)
    searcher = prep.searcher(held)
    folded = len(prep.model.layers) > 1 and prep.model.layers[0].bias.shape[0] < prep.model.embedding.shape[1]
    table = held._table(folded)
    width = table.q.shape[1]
    keeps = grid_keeps(prep.plan)
    int8 = [searcher.measure(Candidate(k, "skip", folded)) for k in keeps]
    exact = prep.model.embedding
    if folded:
        exact = exact @ prep.model.layers[0].weight.T  # (V, H1): the folded rows, as the packer stores them
    mixed = []
    for share in SHARES:
        for m in int8:
            k = m.candidate.keep
            tail = prep.plan.ranked_rows[k - int(share * k) : k]  # the least frequent kept rows
            if tail.size == 0:
                continue
            q, s = table.q.copy(), table.scales.copy()
            q[tail], s[tail] = quantize4(exact[tail].astype(np.float32))
            held._tables[folded] = replace(table, q=q, scales=s)
            four = held.measure(Candidate(k, "skip", folded), None, m.bytes - tail.size * (width // 2))
            mixed.append((share, four))
        held._tables[folded] = table
    return {"int8": int8, "mixed": mixed, "texts": len(held)}


def smallest(points, threshold: float) -> int | None:
    ok = [p.bytes for p in points if p.agreement + 1e-12 >= threshold]
    return min(ok) if ok else None


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.tail4", description=__doc__.splitlines()[0])
    p.add_argument("--work", type=Path, default=DEFAULT_WORK)
    p.add_argument("--models", default="sms,headlines,glove")
    args = p.parse_args(argv)
    config = BenchConfig(work=args.work.resolve())
    lines = ["| model | held-out agreement at least | int8 bytes | 4-bit tail bytes (share) | ratio |", "|---|---|---|---|---|"]
    for subject in subjects(config, [n.strip() for n in args.models.split(",") if n.strip()]):
        pts = frontier_points(subject)
        best = max(m.agreement for m in pts["int8"])
        for threshold in (best - 0.001, 0.99, 0.95):
            a = smallest(pts["int8"], threshold)
            b = [(smallest([m for s, m in pts["mixed"] if s == share], threshold), share) for share in SHARES]
            b = [x for x in b if x[0] is not None]
            if a is None or not b:
                continue
            bb, share = min(b)
            lines.append(f"| {subject.name} ({pts['texts']:,} held-out) | {100 * threshold:.2f}% | {a:,} | {bb:,} ({share:g}) | "
                         f"{a / bb:.2f}x |")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
