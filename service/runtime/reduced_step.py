"""One GRU step with reduced-precision scoring: approximate top candidates, then exact re-scoring.

Scoring every item is memory-bandwidth bound: at a million items and D = 100 one click reads
400 MB of float32 output vectors. This path reads a quarter of that (int8) or a half (fp16):

    x = embedding[items]                        numpy, rows of a read-only memory map
    next_hidden, f = features.onnx(x, hidden)   ONNX Runtime, the GRU without item tables
    candidates = candidates_<p>.onnx(f, ...)    ONNX Runtime: approximate score of every item,
                                                the best `candidates_for(top_n)` of them
    exact = vectors[candidates] . f + bias      numpy, float32, the candidates only
    top_n of the exact scores                   so answers carry exact fp32 scores

The item tables go into ONNX Runtime as inputs, fed from the memory maps each call (CPU inputs are
used in place, not copied), so the pages are the OS's page cache, shared by every worker. Same
call contract as `OnnxStep.run`; `scoring` names the path for Server-Timing.
"""

from __future__ import annotations

import numpy as np

from service.artifacts.item_vectors import FEATURE_ZERO_POINT, ItemVectors
from service.errors import StepError
from service.runtime.onnx_step import open_session, ort_errors

# The exact re-scoring looks at this many candidates per row at least (and 4 x top_n when more
# are asked for): a few microseconds of numpy, and enough for the approximate ranking's errors
# near the top 20 to be caught (tests/service/runtime/test_reduced_step.py measures agreement).
MIN_CANDIDATES = 512


def candidates_for(top_n: int, n_items: int) -> int:
    return min(n_items, max(MIN_CANDIDATES, 4 * top_n))


def quantise_rows(features: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """float32 [B, D] -> uint8 [B, D] (code + 128), float32 scales [B, 1]: symmetric per row,
    scale = max|f| / 127, code in -127..127 (common practice), so |f - scale * code| <= scale / 2."""
    scales = np.abs(features).max(axis=1, keepdims=True) / 127.0  # [B, 1]
    scales[scales == 0] = 1.0
    codes = np.rint(features / scales) + FEATURE_ZERO_POINT
    return codes.astype(np.uint8), scales.astype(np.float32)


class ReducedStep:
    """`OnnxStep`'s `run` for an artifact with item vectors, scoring in `precision` (fp16 | int8)."""

    def __init__(self, tables: ItemVectors, precision: str, threads: int = 1) -> None:
        if precision not in tables.codes:
            raise StepError(f"no {precision!r} item vectors; the artifact has {', '.join(tables.codes)}")
        self.scoring = precision
        self.path = tables.feature_graph
        self.tables = tables
        self._features = open_session(tables.feature_graph, threads)
        self._candidates = open_session(tables.candidate_graphs[precision], threads)
        hidden_shape = {i.name: i.shape for i in self._features.get_inputs()}["hidden"]  # [L, batch, H]
        self.layers, self.hidden_size, self.n_items = int(hidden_shape[0]), int(hidden_shape[2]), tables.n_items
        self._feed = {"codes": tables.codes[precision], "bias": tables.bias}
        if precision == "int8":
            self._feed["scales"] = tables.scales
        self._k: dict[int, np.ndarray] = {}

    def _query(self, features: np.ndarray) -> dict[str, np.ndarray]:
        if self.scoring != "int8":
            return {"features": features}
        codes, scales = quantise_rows(features)
        return {"features": codes, "feature_scales": scales}

    def close(self) -> None:
        self._features = self._candidates = None

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
        k = candidates_for(int(top_n), self.n_items)
        k_in = self._k.get(k)
        if k_in is None:
            k_in = self._k[k] = np.array([k], dtype=np.int64)
        x = np.ascontiguousarray(self.tables.embedding[items])  # [B, E]
        try:
            next_hidden, features = self._features.run(None, {"x": x, "hidden": hidden})  # [L, B, H], [B, D]
            candidates, _ = self._candidates.run(None, {**self._query(features), "k": k_in, **self._feed})  # [B, k]
        except ort_errors() as exc:
            raise StepError(f"{self.path}: step failed ({' '.join(str(exc).split())})") from exc
        exact = np.einsum("bkd,bd->bk", self.tables.vectors[candidates], features) + self.tables.bias[candidates]  # [B, k]
        order = np.argsort(-exact, axis=1, kind="stable")[:, :top_n]  # [B, top_n]
        return next_hidden, np.take_along_axis(candidates, order, 1), np.take_along_axis(exact, order, 1).astype(np.float32)

