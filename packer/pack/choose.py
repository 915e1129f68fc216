"""Choosing the bundle by measurement: the smallest candidate that holds a held-out agreement, or the best one.

Candidates are cuts of the row ranking × pruned-token policy × fold. A target is met by scanning a coarse
geometric grid of cuts up to the first that passes, then bisecting below it (agreement is close to monotone in
the cut, not exactly: the answer is a passing cut, the smallest on the bisection's path); the frontier's grid is GRID_POINTS geometric row counts from the smallest possible cut to
every row the selection texts use, plus every reachable row (quantisation only).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np

from danpack.model import FloatModel
from danpack.pack.heldout import POLICY_ORDER, Candidate, Estimator, HeldOut, Measure
from danpack.pack.vocab import VocabPlan, pruned_mean_row

GRID_POINTS = 24  # frontier: geometric row counts between the smallest cut and every seen row
SEARCH_POINTS = 12  # target search: the coarse grid scanned before the bisection
SHARE_SLACK = 1e-12  # a share k/n compared with a threshold: rounding of the division never decides


def seen_cut(plan: VocabPlan) -> int:
    """Rows up to the last one the selection texts use (forced rows first, then by count)."""
    return max(plan.forced + int(np.count_nonzero(plan.row_counts[plan.forced :])), plan.forced, 1)


def grid_keeps(plan: VocabPlan, points: int = GRID_POINTS) -> list[int]:
    """Row counts to try, ascending: a geometric grid up to every seen row, then every reachable row."""
    low, seen, full = max(plan.forced, 1), seen_cut(plan), len(plan.ranked_rows)
    grid = np.unique(np.round(np.geomspace(low, max(seen, low), points)).astype(np.int64)) if full else np.array([], np.int64)
    return sorted({*map(int, grid), min(seen, full), full} - {0}) or [full]


class Searcher:
    """Measures candidates on the held-out slice (each once) and picks among them."""

    def __init__(self, model: FloatModel, plan: VocabPlan, heldout: HeldOut, estimator: Estimator) -> None:
        self.model, self.plan, self.heldout, self.estimator = model, plan, heldout, estimator
        self.measured: dict[Candidate, Measure] = {}

    def measure(self, c: Candidate) -> Measure:
        if c not in self.measured:
            rest = pruned_mean_row(self.model.embedding, self.plan.with_keep(c.keep)) if c.policy == "rest" else None
            self.measured[c] = self.heldout.measure(c, rest, self.estimator.bytes(c))
        return self.measured[c]

    def grid(self, combos: Sequence[tuple[str, bool]], keeps: Iterable[int] | None = None) -> list[Measure]:
        keeps = list(grid_keeps(self.plan) if keeps is None else keeps)
        return [self.measure(Candidate(k, p, f)) for p, f in combos for k in keeps]

    def smallest(self, combos: Sequence[tuple[str, bool]], threshold: float, bound: bool = False) -> Measure | None:
        """The fewest bytes among candidates with held-out agreement ≥ threshold (None when none reaches it);
        with `bound`, the agreement's 90% lower confidence bound must reach it (a target the user states).

        Per policy and fold: the coarse grid (SEARCH_POINTS cuts) ascending until a cut passes, then a bisection
        between it and the grid cut below. Cuts whose bundle could not beat the best found so far are skipped.
        """
        keeps = grid_keeps(self.plan, SEARCH_POINTS)
        best: Measure | None = None
        order = sorted(combos, key=lambda pf: (self.estimator.bytes(Candidate(keeps[0], *pf)), _order_of(pf[0])))
        for policy, folded in order:
            def at(k: int) -> Candidate:
                return Candidate(k, policy, folded)

            below, hi = keeps[0] - 1, None
            for k in keeps:
                if best is not None and self.estimator.bytes(at(k)) >= best.bytes:
                    break  # every larger cut of this policy and fold costs more than the best so far
                if self._passes(at(k), threshold, bound):
                    hi = k
                    break
                below = k
            if hi is None:
                continue
            lo = below  # fails (or is below the smallest cut)
            while hi - lo > 1:
                mid = (lo + hi) // 2
                if self._passes(at(mid), threshold, bound):
                    hi = mid
                else:
                    lo = mid
            found = self.measure(at(hi))
            if best is None or (found.bytes, -found.agreement, _order(found)) < (best.bytes, -best.agreement, _order(best)):
                best = found
        return best

    def _passes(self, c: Candidate, threshold: float, bound: bool) -> bool:
        m = self.measure(c)
        return (m.agreement_low if bound else m.agreement) + SHARE_SLACK >= threshold

    def best(self, measures: Iterable[Measure]) -> Measure:
        """Highest agreement; then smallest mean |Δp|; then policy order skip, unk, rest; then fewest bytes."""
        return min(measures, key=lambda m: (-m.agreement, m.mean_abs_prob_diff, _order(m), m.bytes))


def _order(m: Measure) -> int:
    return POLICY_ORDER.index(m.candidate.policy)


def _order_of(policy: str) -> int:
    return POLICY_ORDER.index(policy)


def non_dominated(measures: Sequence[Measure]) -> list[Measure]:
    """The frontier: candidates no other beats on both bytes (fewer or equal) and agreement (higher or equal),
    by bytes ascending; agreement rises strictly along it."""
    out: list[Measure] = []
    for m in sorted(measures, key=lambda m: (m.bytes, -m.agreement, _order(m))):
        if not out or m.agreement > out[-1].agreement + SHARE_SLACK:
            out.append(m)
    return out
