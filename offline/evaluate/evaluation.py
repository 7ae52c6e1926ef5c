"""Offline evaluation of any `SessionScorer` by the next-click protocol, with paired comparisons.

`evaluate` walks the sessions of a split (see `events.py`), ranks every target click and keeps,
per session, the sums each metric is made of (hits, reciprocal ranks, popularity of the top-k
lists, and which items the top-k lists reached). From those sums it computes every metric and its
95% bootstrap interval over sessions (`metrics.py`); `lift` reuses them to compare two
recommenders on the same resamples of the same sessions (a paired bootstrap), which is far tighter
than comparing two separate intervals, because most of the variance is shared (which sessions
are easy).
"""

from __future__ import annotations

import sys
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from tqdm import tqdm

from service.errors import InputDataError
from offline.data.dataset import SessionSplit
from offline.evaluate.breakdowns import GroupSums, popularity_groups
from offline.evaluate.next_clicks import best_items, iterate_events, target_ranks
from offline.evaluate.ranking_metrics import (
    bootstrap_weights,
    coverage_replicates,
    percentile_interval,
    popularity_shares,
    ratio_replicates,
)
from offline.evaluate.scorer import SessionScorer, TopLists

# The baselines a GRU must beat for its verdict line: the strongest sequential simple models
# (the full decision, over every simple recommender and with the cost per click, is decision.py).
VERDICT_BASELINES = ("markov", "item-knn", "session-knn")
# Pending (session, item) entries of the top-k lists before they are deduplicated.
_INCIDENCE_COMPACT_AT = 1 << 22


@dataclass(frozen=True)
class Metric:
    value: float
    ci95: tuple[float, float]

    def to_json(self) -> dict:
        return {"value": self.value, "ci95": [self.ci95[0], self.ci95[1]]}


@dataclass
class Result:
    """One recommender on one split: metric values with intervals, and the per-session sums behind them."""

    name: str
    ks: tuple[int, ...]
    n_items: int
    sessions: np.ndarray  # int64 [S], indices in the split of the evaluated sessions (>= 2 clicks)
    events: np.ndarray  # float64 [S], target clicks per session
    sums: np.ndarray  # float64 [S, len(columns)], per-session sums of each ratio metric
    columns: tuple[str, ...]  # names of the columns of `sums`: recall@k, mrr@k, click_share@k
    incidence: dict[int, sparse.csr_matrix]  # k -> [n_items, S], items reached by each session's top-k lists
    bootstrap: int
    seed: int
    metrics: dict[str, Metric] = field(default_factory=dict)
    groups: GroupSums | None = None  # per-session sums of the breakdowns and the Recall@k curve (breakdowns.py)
    exclude_seen: bool = False

    @property
    def n_events(self) -> int:
        return int(self.events.sum())

    @property
    def n_sessions(self) -> int:
        return len(self.sessions)

    def to_json(self) -> dict:
        out: dict = {name: m.to_json() for name, m in self.metrics.items()}
        out["events"] = self.n_events
        out["sessions"] = self.n_sessions
        return out


def metric_names(ks: Sequence[int]) -> list[str]:
    return [f"{m}@{k}" for k in ks for m in ("recall", "mrr", "coverage", "click_share")]


def evaluate(
    scorer: SessionScorer,
    split: SessionSplit,
    ks: Sequence[int] = (20,),
    *,
    popularity: np.ndarray,
    batch_size: int = 256,
    bootstrap: int = 1000,
    seed: int = 0,
    progress: bool | None = None,
    exclude_seen: bool = False,
) -> Result:
    """Measure `scorer` on every session of `split` with two or more clicks.

    popularity: training clicks per item (or shares), [n_items], for click_share@k and the
    head/torso/tail groups.
    exclude_seen: rank the items the visit has already clicked last, as the service leaves them
    out of its lists (the same rule for every recommender; a repeat click is then a miss).
    progress: a tqdm bar on stderr; None shows it only when stderr is a terminal.
    """
    ks = _check_ks(ks)
    if bootstrap < 1:
        raise ValueError(f"bootstrap must be a positive number of resamples, got {bootstrap}")
    n_items = int(scorer.n_items)
    shares = popularity_shares(popularity)  # [n_items]
    if len(shares) != n_items:
        raise ValueError(f"popularity has {len(shares)} items, {scorer.name} scores {n_items}")
    if split.n_clicks and (int(split.items.min()) < 0 or int(split.items.max()) >= n_items):
        raise InputDataError(f"split holds item indices outside 0..{n_items - 1}, the items {scorer.name} scores")

    lengths = split.lengths()
    evaluated = np.flatnonzero(lengths >= 2)  # [S]
    if len(evaluated) == 0:
        raise InputDataError("no session with two or more clicks to evaluate on")
    columns = tuple(f"{m}@{k}" for k in ks for m in ("recall", "mrr", "click_share"))
    sums = np.zeros((split.n_sessions, len(columns)), dtype=np.float64)  # per split session
    incidence = _TopListIncidence(n_items)
    groups = GroupSums(split.n_sessions, popularity_groups(np.asarray(popularity, dtype=np.float64)))
    kmax = max(ks)
    show = sys.stderr.isatty() if progress is None else progress
    bar = tqdm(total=int((lengths[evaluated] - 1).sum()), desc=scorer.name, unit="event", file=sys.stderr, disable=not show)

    for batch in iterate_events(scorer, split, batch_size):
        scores = _without_seen(batch.scores, batch.sessions, batch.positions, split) if exclude_seen else batch.scores
        ranks = target_ranks(scores, batch.targets)  # [m]
        if isinstance(scores, TopLists) and scores.width < min(kmax, n_items):
            raise InputDataError(f"cut-off {kmax} is beyond the {scores.width} items {scorer.name} finds per click")
        top = best_items(scores, kmax)  # [m, kk], best first
        pop_cumulative = np.cumsum(shares[top], axis=1)  # [m, kk]
        values = np.empty((len(ranks), len(columns)), dtype=np.float64)  # [m, columns]
        for i, k in enumerate(ks):
            kk = min(k, top.shape[1])
            hit = ranks <= k
            values[:, 3 * i] = hit
            values[:, 3 * i + 1] = np.where(hit, 1.0 / ranks, 0.0)
            values[:, 3 * i + 2] = pop_cumulative[:, kk - 1] / kk
        sums[batch.sessions] += values  # one event per session in a batch: no repeated rows
        incidence.add(batch.sessions, top)
        groups.add(batch.sessions, batch.positions, batch.targets, ranks)
        bar.update(len(ranks))
    bar.close()

    result = Result(
        name=scorer.name,
        ks=ks,
        n_items=n_items,
        sessions=evaluated.astype(np.int64),
        events=(lengths[evaluated] - 1).astype(np.float64),
        sums=sums[evaluated],
        columns=columns,
        incidence=incidence.matrices(ks, evaluated, split.n_sessions),
        bootstrap=int(bootstrap),
        seed=int(seed),
        groups=groups.select(evaluated),
        exclude_seen=bool(exclude_seen),
    )
    result.metrics = _metrics_with_intervals(result)
    return result


def _without_seen(scores: np.ndarray | TopLists, sessions: np.ndarray, positions: np.ndarray, split: SessionSplit) -> np.ndarray | TopLists:
    """A copy of `scores` [m, n_items] with the items each visit clicked before its target at -inf.

    A copy: scorers own the buffer they return and may build the next scores on it.
    """
    rows = np.repeat(np.arange(len(sessions)), positions)  # event m has positions[m] clicks before it
    within = np.arange(len(rows)) - np.repeat(np.cumsum(positions) - positions, positions)
    seen = split.items[np.repeat(split.offsets[sessions], positions) + within].astype(np.int64)
    if isinstance(scores, TopLists):
        return scores.without(rows, seen)
    out = np.array(scores, dtype=scores.dtype, copy=True)
    out[rows, seen] = -np.inf
    return out


def lift(result_a: Result, result_b: Result, metric: str) -> tuple[float, tuple[float, float]]:
    """Relative lift of a over b on `metric` (0.1 = 10% better), with a paired-bootstrap 95% interval.

    Both results must come from the same sessions; each resample draws the same sessions for both.
    For coverage, both resampled coverages sit below the observed ones by a similar amount, so their
    ratio is used as it is.
    """
    if not np.array_equal(result_a.sessions, result_b.sessions) or not np.array_equal(result_a.events, result_b.events):
        raise ValueError(f"{result_a.name} and {result_b.name} were not evaluated on the same sessions")
    for r in (result_a, result_b):
        if metric not in r.metrics:
            raise ValueError(f"{r.name} has no metric {metric!r} (has {', '.join(r.metrics)})")
    va, vb = result_a.metrics[metric].value, result_b.metrics[metric].value
    point = va / vb - 1.0 if vb > 0 else float("nan")
    replicates = []
    for w in bootstrap_weights(result_a.n_sessions, result_a.bootstrap, result_a.seed):
        ra, rb = _replicates(result_a, metric, w), _replicates(result_b, metric, w)  # [b]
        with np.errstate(invalid="ignore", divide="ignore"):
            replicates.append(ra / rb - 1.0)
    rel = np.concatenate(replicates)
    rel[~np.isfinite(rel)] = np.nan
    if np.isnan(rel).all():
        return point, (float("nan"), float("nan"))
    lo, hi = percentile_interval(rel)
    return point, (float(lo), float(hi))


def verdict_lines(results: Mapping[str, Result] | Iterable[Result]) -> list[str]:
    """One line per GRU result: its Recall and MRR lift over the strongest of markov and item-knn."""
    rs = list(results.values()) if isinstance(results, Mapping) else list(results)
    baselines = [r for r in rs if r.name in VERDICT_BASELINES]
    lines = []
    for g in (r for r in rs if r.name.startswith("gru")):
        common = [k for k in g.ks if all(k in b.ks for b in baselines)]
        if not baselines or not common:
            lines.append(f"{g.name}: no {' or '.join(VERDICT_BASELINES)} result with the same cut-off to compare with")
            continue
        k = 20 if 20 in common else common[0]
        best = max(baselines, key=lambda b: b.metrics[f"recall@{k}"].value)
        parts, intervals = [], []
        for label, metric in ((f"Recall@{k}", f"recall@{k}"), (f"MRR@{k}", f"mrr@{k}")):
            point, (lo, hi) = lift(g, best, metric)
            parts.append(f"{label} {_percent(point)} (95% CI {_percent(lo)} to {_percent(hi)})")
            intervals.append((lo, hi))
        lo, hi = intervals[0]  # the judgement follows Recall, the headline metric
        if lo > 0:
            judgement = f"better than {best.name}"
        elif hi < 0:
            judgement = f"worse than {best.name}"
        else:
            judgement = f"not distinguishable from {best.name}"
        lines.append(f"{g.name} vs {best.name}: {', '.join(parts)}: {judgement}")
    return lines


def results_json(results: Mapping[str, Result] | Iterable[Result]) -> dict:
    """The JSON report: an object keyed by recommender name only."""
    rs = list(results.values()) if isinstance(results, Mapping) else list(results)
    return {r.name: r.to_json() for r in rs}


def format_table(results: Mapping[str, Result] | Iterable[Result]) -> str:
    """Rows: recommenders; columns: each metric as value [95% interval]."""
    rs = list(results.values()) if isinstance(results, Mapping) else list(results)
    if not rs:
        return ""
    names = [m for m in rs[0].metrics]
    for r in rs[1:]:
        names += [m for m in r.metrics if m not in names]
    header = ["recommender", *names]
    rows = [header]
    for r in rs:
        cells = [r.name]
        for m in names:
            metric = r.metrics.get(m)
            if metric is None:
                cells.append("-")
                continue
            f = _format_value(m)
            cells.append(f"{f(metric.value)} [{f(metric.ci95[0])}, {f(metric.ci95[1])}]")
        rows.append(cells)
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _format_value(metric: str):
    # One format per column: click shares are often below 1e-3, so they get six decimals; the
    # ratios (recall, MRR, coverage) four.
    return (lambda v: f"{v:.6f}") if metric.startswith("click_share") else (lambda v: f"{v:.4f}")


def _percent(x: float) -> str:
    return "n/a" if not np.isfinite(x) else f"{x:+.1%}"


def _check_ks(ks: Sequence[int]) -> tuple[int, ...]:
    out: list[int] = []
    for k in ks:
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
            raise ValueError(f"cut-off k must be a positive integer, got {k!r}")
        if int(k) not in out:
            out.append(int(k))
    if not out:
        raise ValueError("at least one cut-off k is needed")
    return tuple(out)


def _replicates(result: Result, metric: str, weights: np.ndarray) -> np.ndarray:
    """Bootstrap values of one metric for the resamples in `weights` [b, S] -> [b]."""
    if metric.startswith("coverage@"):
        return coverage_replicates(weights, result.incidence[int(metric.split("@")[1])])
    col = result.columns.index(metric)
    return ratio_replicates(weights, result.sums[:, col : col + 1], result.events)[:, 0]


def _metrics_with_intervals(result: Result) -> dict[str, Metric]:
    ratio_reps, coverage_reps = [], []
    for w in bootstrap_weights(result.n_sessions, result.bootstrap, result.seed):
        ratio_reps.append(ratio_replicates(w, result.sums, result.events))  # [b, columns]
        coverage_reps.append(np.stack([coverage_replicates(w, result.incidence[k]) for k in result.ks], axis=1))  # [b, ks]
    ratio_lo, ratio_hi = percentile_interval(np.concatenate(ratio_reps))
    coverage_reps = np.concatenate(coverage_reps)  # [B, ks]
    cov_lo, cov_hi = percentile_interval(coverage_reps)
    # Coverage counts distinct items, and a resample holds only ~63% of the distinct sessions, so
    # every resample covers less than the data did: the bootstrap distribution sits below the
    # observed value. Its spread is kept and its bias (mean - observed) removed, so the interval
    # describes the variability around the observed coverage (bias-corrected percentile interval).
    observed = np.array([(np.diff(result.incidence[k].indptr) > 0).sum() / result.n_items for k in result.ks])
    bias = coverage_reps.mean(axis=0) - observed  # [ks]
    # (min/max: rounding must not leave the observed value a hair outside its own interval)
    cov_lo = np.clip(np.minimum(cov_lo - bias, observed), 0.0, 1.0)
    cov_hi = np.clip(np.maximum(cov_hi - bias, observed), 0.0, 1.0)
    ratio_value = result.sums.sum(axis=0) / result.events.sum()  # [columns]
    metrics: dict[str, Metric] = {}
    for i, k in enumerate(result.ks):
        for m in ("recall", "mrr", "coverage", "click_share"):
            name = f"{m}@{k}"
            if m == "coverage":
                metrics[name] = Metric(float(observed[i]), (float(cov_lo[i]), float(cov_hi[i])))
            else:
                c = result.columns.index(name)
                metrics[name] = Metric(float(ratio_value[c]), (float(ratio_lo[c]), float(ratio_hi[c])))
    return metrics


class _TopListIncidence:
    """Which items each session's top-k lists reached, and at which best position (for every k at once)."""

    def __init__(self, n_items: int) -> None:
        self.n_items = n_items
        self._keys: list[np.ndarray] = []  # int64 session * n_items + item
        self._positions: list[np.ndarray] = []  # int32 position in the top list, 0 = best
        self._pending = 0

    def add(self, sessions: np.ndarray, top: np.ndarray) -> None:
        """sessions int64 [m], top int64 [m, kk] best first."""
        self._keys.append((sessions[:, None] * self.n_items + top).ravel())  # [m * kk]
        self._positions.append(np.broadcast_to(np.arange(top.shape[1], dtype=np.int32), top.shape).ravel())
        self._pending += top.size
        if self._pending >= _INCIDENCE_COMPACT_AT:
            self._compact()

    def _compact(self) -> None:
        if not self._keys:
            return
        keys = np.concatenate(self._keys)
        positions = np.concatenate(self._positions)
        order = np.lexsort((positions, keys))  # by key, best position first
        keys, positions = keys[order], positions[order]
        first = np.ones(len(keys), dtype=bool)
        first[1:] = keys[1:] != keys[:-1]
        self._keys, self._positions = [keys[first]], [positions[first]]
        self._pending = 0

    def matrices(self, ks: Sequence[int], evaluated: np.ndarray, n_split_sessions: int) -> dict[int, sparse.csr_matrix]:
        """k -> binary CSR [n_items, S], columns in the order of `evaluated`."""
        self._compact()
        keys = self._keys[0] if self._keys else np.zeros(0, np.int64)
        positions = self._positions[0] if self._positions else np.zeros(0, np.int32)
        column = np.full(n_split_sessions, -1, dtype=np.int64)
        column[evaluated] = np.arange(len(evaluated))
        out = {}
        for k in ks:
            keep = positions < k
            sess, item = np.divmod(keys[keep], self.n_items)
            out[k] = sparse.csr_matrix(
                (np.ones(int(keep.sum()), dtype=np.float64), (item, column[sess])), shape=(self.n_items, len(evaluated))
            )
        return out
