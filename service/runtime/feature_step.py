"""The GRU step without the item tables, which the reduced-precision and clustered paths share.

    x = embedding[items]                        numpy, rows of a read-only memory map
    next_hidden, f = features.onnx(x, hidden)   ONNX Runtime, the GRU without item tables

A subclass ranks the items from f its own way; `run` keeps `OnnxStep.run`'s contract and checks.
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numpy as np

from service.artifacts.item_vectors import ItemVectors
from service.errors import StepError
from service.runtime.onnx_step import open_session, ort_errors


def touch_pages(table: np.ndarray, page: int = 4096) -> None:
    """Read one byte of every page of a memory-mapped table, at load: each page is then mapped in
    this process (from the page cache every worker shares; from disk once, after an export, whose
    tables are written past the page cache), so early clicks do not each pay thousands of page
    faults (measured at a million items: 5-10 ms per click for the first few hundred clicks, 3 ms
    after, with the tables in the page cache)."""
    flat = table.reshape(-1).view(np.uint8)
    int(flat[::page].sum())


class FeatureStep(ABC):
    scoring = ""  # the subclass's path name (Server-Timing, metrics)

    def __init__(self, tables: ItemVectors, threads: int = 1) -> None:
        self.path = tables.feature_graph
        self.tables = tables
        self._features = open_session(tables.feature_graph, threads)
        touch_pages(tables.embedding)  # a row per click, anywhere in the table
        hidden_shape = {i.name: i.shape for i in self._features.get_inputs()}["hidden"]  # [L, batch, H]
        self.layers, self.hidden_size, self.n_items = int(hidden_shape[0]), int(hidden_shape[2]), tables.n_items

    def close(self) -> None:
        self._features = None

    def zero_hidden(self, batch_size: int) -> np.ndarray:
        return np.zeros((self.layers, batch_size, self.hidden_size), dtype=np.float32)

    def run(self, items: np.ndarray, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """items int64 [B], hidden float32 [L, B, H] -> next_hidden [L, B, H], top_items int64 [B, top_n],
        top_scores float32 [B, top_n] (descending, exact fp32 scores)."""
        if self._features is None:
            raise StepError(f"{self.path}: the step was closed")
        if not isinstance(top_n, (int, np.integer)) or isinstance(top_n, bool) or not 1 <= top_n <= self.n_items:
            raise StepError(f"top_n must be an integer from 1 to {self.n_items}, got {top_n!r}")
        if not isinstance(items, np.ndarray) or items.size == 0 or items.ndim != 1:
            raise StepError(f"{self.path}: a step needs items int64 [B] with B >= 1")
        if items.min() < 0 or items.max() >= self.n_items:
            raise StepError(f"{self.path}: item indices must be from 0 to {self.n_items - 1}")
        x = np.ascontiguousarray(self.tables.embedding[items])  # [B, E]
        try:
            next_hidden, features = self._features.run(None, {"x": x, "hidden": hidden})  # [L, B, H], [B, D]
            top_items, top_scores = self.rank(features, int(top_n))
        except ort_errors() as exc:
            raise StepError(f"{self.path}: step failed ({' '.join(str(exc).split())})") from exc
        return next_hidden, top_items, top_scores

    @abstractmethod
    def rank(self, features: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray]:
        """features float32 [B, D] -> top_items int64 [B, top_n], top_scores float32 [B, top_n], best first."""
