"""Choices made on the validation split, never on the test split: session-KNN's k, M and weighting,
and whether lists leave out the visit's clicked items (`--exclude-seen auto`).

Both evaluate on at most `SAMPLE_SESSIONS` validation sessions (a seeded random sample, the same for
every trial), which keeps a choice to seconds on the demo shop; the trials are recorded.
Session-KNN is tuned coordinate-wise: k and the weighting at the default M first, then M at the best
of those (8 trials, not the 18 of the full grid).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np

from offline.data.dataset import SessionSplit
from offline.evaluate.evaluation import evaluate
from offline.evaluate.scorer import SessionScorer
from offline.evaluate.session_knn import WEIGHTINGS, SessionKNN, session_index

# The grid around the published defaults (k = 100, M = 500, from memory).
NEIGHBOURS_GRID = (50, 100, 200)
CANDIDATES_GRID = (250, 500, 1000)
SAMPLE_SESSIONS = 3000


def validation_sample(split: SessionSplit, max_sessions: int = SAMPLE_SESSIONS, seed: int = 0) -> SessionSplit:
    """At most `max_sessions` sessions of two or more clicks, drawn at random (time order kept)."""
    return split.sample(max_sessions, seed)


def tune_session_knn(
    train: SessionSplit,
    valid: SessionSplit,
    n_items: int,
    counts: np.ndarray,
    k: int = 20,
    exclude_seen: bool = False,
    neighbours: Sequence[int] = NEIGHBOURS_GRID,
    candidates: Sequence[int] = CANDIDATES_GRID,
    weightings: Sequence[str] = WEIGHTINGS,
) -> tuple[dict, list[dict]]:
    """(best parameters, every trial) by validation Recall@k; ties: the earlier trial."""
    valid = validation_sample(valid)
    trials: list[dict] = []
    indices: dict[int, object] = {}

    def trial(nb: int, m: int, weighting: str) -> None:
        if m not in indices:
            indices[m] = session_index(train, n_items, m)
        result = evaluate(SessionKNN(indices[m], counts, nb, weighting), valid, (k,), popularity=counts, bootstrap=1, progress=False, exclude_seen=exclude_seen)
        trials.append({
            "neighbours": nb, "candidates": m, "weighting": weighting,
            f"recall@{k}": result.metrics[f"recall@{k}"].value, f"mrr@{k}": result.metrics[f"mrr@{k}"].value,
        })  # fmt: skip

    middle = candidates[len(candidates) // 2]
    for nb, weighting in itertools.product(neighbours, weightings):
        trial(nb, middle, weighting)
    first = max(trials, key=lambda t: t[f"recall@{k}"])  # max keeps the first of equals
    for m in candidates:
        if m != middle:
            trial(first["neighbours"], m, first["weighting"])
    best = max(trials, key=lambda t: t[f"recall@{k}"])
    return {key: best[key] for key in ("neighbours", "candidates", "weighting")}, trials


def choose_exclude_seen(scorers: Sequence[SessionScorer], valid: SessionSplit, counts: np.ndarray, k: int = 20) -> tuple[bool, dict]:
    """The setting under which the best recommender on validation has the higher Recall@k (ties: on,
    the service's own default); with every recommender's validation Recall@k under both."""
    valid = validation_sample(valid)
    table: dict[str, dict[str, float]] = {"on": {}, "off": {}}
    for setting, flag in (("on", True), ("off", False)):
        for scorer in scorers:
            result = evaluate(scorer, valid, (k,), popularity=counts, bootstrap=1, progress=False, exclude_seen=flag)
            table[setting][scorer.name] = result.metrics[f"recall@{k}"].value
    best_on, best_off = max(table["on"].values()), max(table["off"].values())
    return best_on >= best_off, table
