"""Where a lift comes from: Recall@20 and MRR@20 by position in the visit and by target popularity,
and the Recall@k curve for k = 1..50, each with session-bootstrap intervals (see ranking_metrics.py).

Groups of a target click (an event):
    position    how many clicks of the visit came before it: 1, 2-3, 4-9, 10+
    popularity  the target item's share of training clicks: head / torso / tail, the items that
                make up the first, second and last third of all training clicks (most clicked
                first; an item never clicked in training is tail)

The evaluator adds, per session, the hits and reciprocal ranks of its events in each group
(`GroupSums`); metrics are ratios of weighted session sums like every other metric, so the
intervals and the paired lifts reuse the same resamples.
"""

from __future__ import annotations

import warnings

import numpy as np

from offline.evaluate.ranking_metrics import bootstrap_weights, percentile_interval

BREAKDOWN_K = 20
CURVE_KS = np.arange(1, 51)  # Recall@k for k = 1..50
POSITION_GROUPS = ("1", "2-3", "4-9", "10+")
POPULARITY_GROUPS = ("head", "torso", "tail")
GROUPS = tuple(f"position {g}" for g in POSITION_GROUPS) + tuple(f"popularity {g}" for g in POPULARITY_GROUPS)
_POSITION_EDGES = np.array([2, 4, 10])  # position 1 -> 0, 2-3 -> 1, 4-9 -> 2, 10+ -> 3


def position_group(positions: np.ndarray) -> np.ndarray:
    """Group 0..3 of events whose target is preceded by `positions` clicks (>= 1)."""
    return np.searchsorted(_POSITION_EDGES, positions, side="right")


def popularity_groups(counts: np.ndarray) -> np.ndarray:
    """int64 [n_items]: 0 head, 1 torso, 2 tail, by thirds of training clicks (see the module docstring).

    An item belongs to the third in which its clicks start when items are laid end to end, most
    clicked first (equal clicks: lower index first).
    """
    counts = np.asarray(counts, dtype=np.float64)
    total = counts.sum()
    group = np.full(len(counts), 2, dtype=np.int64)
    if total <= 0:
        return group
    order = np.lexsort((np.arange(len(counts)), -counts))
    start = (np.cumsum(counts[order]) - counts[order]) / total  # share of clicks before each item
    group[order] = np.where(start < 1 / 3, 0, np.where(start < 2 / 3, 1, 2))
    group[counts == 0] = 2
    return group


class GroupSums:
    """Per-session sums for the breakdowns and the Recall@k curve, filled batch by batch."""

    def __init__(self, n_sessions: int, item_group: np.ndarray) -> None:
        self.item_group = item_group  # [n_items] 0..2
        self.hits = np.zeros((n_sessions, len(GROUPS)), dtype=np.float64)  # Recall@20 hits
        self.rr = np.zeros((n_sessions, len(GROUPS)), dtype=np.float64)  # reciprocal ranks within 20
        self.events = np.zeros((n_sessions, len(GROUPS)), dtype=np.float64)
        self.curve = np.zeros((n_sessions, len(CURVE_KS)), dtype=np.float64)  # hits at k = 1..50

    def add(self, sessions: np.ndarray, positions: np.ndarray, targets: np.ndarray, ranks: np.ndarray) -> None:
        """One event per session (as the evaluator's batches hold)."""
        hit = ranks <= BREAKDOWN_K
        rr = np.where(hit, 1.0 / ranks, 0.0)
        for column in (position_group(positions), len(POSITION_GROUPS) + self.item_group[targets]):
            self.hits[sessions, column] += hit
            self.rr[sessions, column] += rr
            self.events[sessions, column] += 1.0
        self.curve[sessions] += ranks[:, None] <= CURVE_KS[None, :]

    def select(self, rows: np.ndarray) -> "GroupSums":
        out = GroupSums(0, self.item_group)
        out.hits, out.rr, out.events, out.curve = self.hits[rows], self.rr[rows], self.events[rows], self.curve[rows]
        return out


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return num / den


def group_metrics(sums: GroupSums, resamples: int, seed: int) -> dict[str, dict]:
    """{group: {"events": n, "recall@20": {value, ci95}, "mrr@20": {value, ci95}}}."""
    reps_hit, reps_rr = [], []
    for w in bootstrap_weights(len(sums.events), resamples, seed):
        den = w @ sums.events  # [b, G]
        reps_hit.append(_ratio(w @ sums.hits, den))
        reps_rr.append(_ratio(w @ sums.rr, den))
    out: dict[str, dict] = {}
    events = sums.events.sum(axis=0)
    for name, num, reps in (("recall", sums.hits, reps_hit), ("mrr", sums.rr, reps_rr)):
        value = _ratio(num.sum(axis=0), events)
        with warnings.catch_warnings():  # a group with no event has no interval (all-NaN column)
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = percentile_interval(np.concatenate(reps))
        for g, group in enumerate(GROUPS):
            entry = out.setdefault(group, {"events": int(events[g])})
            entry[f"{name}@{BREAKDOWN_K}"] = {"value": _finite(value[g]), "ci95": [_finite(lo[g]), _finite(hi[g])]}
    return out


def group_lifts(a: GroupSums, b: GroupSums, resamples: int, seed: int) -> dict[str, dict]:
    """Relative lift of a over b per group on Recall@20 and MRR@20, paired bootstrap (same sessions)."""
    reps: dict[str, list[np.ndarray]] = {"recall": [], "mrr": []}
    for w in bootstrap_weights(len(a.events), resamples, seed):
        reps["recall"].append(_ratio(w @ a.hits, w @ b.hits) - 1.0)
        reps["mrr"].append(_ratio(w @ a.rr, w @ b.rr) - 1.0)
    out: dict[str, dict] = {}
    for name, na, nb in (("recall", a.hits, b.hits), ("mrr", a.rr, b.rr)):
        point = _ratio(na.sum(axis=0), nb.sum(axis=0)) - 1.0
        r = np.concatenate(reps[name])
        r[~np.isfinite(r)] = np.nan
        with warnings.catch_warnings():  # a group with no event has no interval (all-NaN column)
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = percentile_interval(r)
        for g, group in enumerate(GROUPS):
            out.setdefault(group, {})[f"{name}@{BREAKDOWN_K}"] = {"value": _finite(point[g]), "ci95": [_finite(lo[g]), _finite(hi[g])]}
    return out


def recall_curve(sums: GroupSums, resamples: int, seed: int) -> dict[str, list]:
    """Recall@k for k = 1..50 with 95% intervals: {"k": [...], "value": [...], "lo": [...], "hi": [...]}."""
    total = sums.events[:, : len(POSITION_GROUPS)].sum(axis=1)  # events per session (each in one position group)
    reps = [_ratio(w @ sums.curve, (w @ total)[:, None]) for w in bootstrap_weights(len(total), resamples, seed)]
    lo, hi = percentile_interval(np.concatenate(reps))
    value = sums.curve.sum(axis=0) / max(total.sum(), 1.0)
    return {"k": CURVE_KS.tolist(), "value": value.tolist(), "lo": lo.tolist(), "hi": hi.tolist()}


def _finite(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None
