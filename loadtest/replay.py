"""Visits to replay: the held-out test sessions of a prepared data set, with the log's own gaps.

The CLI reads the prepared data set once and writes the visits into one small file that every
Locust worker process loads, so a worker never reads the (possibly large) training split.

Visit file (`.npz`): items int32 [n_clicks] (indices into item_ids), offsets int64 [n_visits + 1],
gaps float32 [n_clicks] (seconds since the visit's previous click; 0 for a first click),
source int64 [n_visits] (index of the session in its split), item_ids str [n_items].
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from service.errors import InputDataError
from offline.data.dataset import SPLITS, PreparedData


@dataclass(frozen=True)
class VisitSet:
    items: np.ndarray  # int32 [n_clicks], indices into item_ids
    offsets: np.ndarray  # int64 [n_visits + 1]
    gaps: np.ndarray  # float32 [n_clicks], seconds since the previous click of the same visit
    source: np.ndarray  # int64 [n_visits], session index in the split the visits came from
    item_ids: list[str]

    @property
    def n_visits(self) -> int:
        return len(self.offsets) - 1

    @property
    def n_clicks(self) -> int:
        return int(self.offsets[-1])

    def clicks(self, v: int) -> list[str]:
        """Item ids of visit v, in click order."""
        ids = self.item_ids
        return [ids[i] for i in self.items[self.offsets[v] : self.offsets[v + 1]]]

    def visit_gaps(self, v: int) -> list[float]:
        return self.gaps[self.offsets[v] : self.offsets[v + 1]].tolist()

    def share(self, worker_index: int, n_workers: int) -> list[int]:
        """The visits worker `worker_index` of `n_workers` replays: every n-th one, so the shares
        are disjoint, together cover every visit, and each holds short and long visits alike."""
        return list(range(worker_index, self.n_visits, n_workers))

    def save(self, path: Path) -> None:
        np.savez(
            path,
            items=self.items,
            offsets=self.offsets,
            gaps=self.gaps,
            source=self.source,
            item_ids=np.asarray(self.item_ids, dtype=str),
        )

    @staticmethod
    def load(path: Path) -> "VisitSet":
        with np.load(path, allow_pickle=False) as z:
            return VisitSet(
                items=z["items"].astype(np.int32),
                offsets=z["offsets"].astype(np.int64),
                gaps=z["gaps"].astype(np.float32),
                source=z["source"].astype(np.int64),
                item_ids=[str(s) for s in z["item_ids"].tolist()],
            )


def visits_from_data(data: Path, split: str = "test", max_visits: int | None = None) -> VisitSet:
    """Every session of `split` (in its stored order, first `max_visits` if given) as a visit."""
    if split not in SPLITS:
        raise InputDataError(f"split {split!r}: choose one of {', '.join(SPLITS)}")
    if max_visits is not None and max_visits < 1:
        raise InputDataError(f"max visits must be at least 1, got {max_visits}")
    prepared = PreparedData.load(Path(data))
    s = prepared.split(split)
    lengths = s.lengths()
    keep = np.flatnonzero(lengths >= 1)
    if max_visits is not None:
        keep = keep[:max_visits]
    if len(keep) == 0:
        raise InputDataError(f"{data}: the {split} split has no sessions to replay")
    parts_items, parts_gaps = [], []
    for v in keep:
        lo, hi = int(s.offsets[v]), int(s.offsets[v + 1])
        parts_items.append(s.items[lo:hi])
        t = s.times[lo:hi].astype(np.float64)
        # Clicks of one session are stored in time order, so the gaps are >= 0; clip anyway so a
        # log with equal or shuffled timestamps never asks a visitor to wait a negative time.
        parts_gaps.append(np.clip(np.diff(t, prepend=t[0]), 0.0, None).astype(np.float32))
    items = np.concatenate(parts_items).astype(np.int32)
    if len(items) and (items.min() < 0 or items.max() >= prepared.n_items):
        raise InputDataError(f"{data}: the {split} split refers to item indices outside 0..{prepared.n_items - 1}")
    offsets = np.concatenate([[0], np.cumsum(lengths[keep])]).astype(np.int64)
    return VisitSet(
        items=items,
        offsets=offsets,
        gaps=np.concatenate(parts_gaps),
        source=keep.astype(np.int64),
        item_ids=list(prepared.item_ids),
    )
