"""Pieces more than one benchmark measures with."""

from __future__ import annotations

import numpy as np


class MatVecFloor:
    """NumPy matrix-vector scoring and top-k with a GRU step's sizes, outputs prepared once.

    The part of a click no implementation can skip: scores = f @ O^T + b, then argpartition for the
    top `top_n` and a sort of those. Call it under `threadpool_limits(1)` to time one core.
    """

    def __init__(self, n_items: int, size: int, batch: int, top_n: int, seed: int) -> None:
        rng = np.random.default_rng(seed)
        # O^T [D, n_items], the layout the step graph stores too and NumPy's fastest here.
        self.output_t = (0.1 * rng.standard_normal((size, n_items))).astype(np.float32)
        self.bias = (0.1 * rng.standard_normal(n_items)).astype(np.float32)  # [n_items]
        self.features = rng.standard_normal((batch, size)).astype(np.float32)  # f [B, D]
        self.scores = np.empty((batch, n_items), dtype=np.float32)
        self.top_n = top_n

    def __call__(self) -> np.ndarray:
        s = np.matmul(self.features, self.output_t, out=self.scores)  # [B, n_items]
        s += self.bias
        top = np.argpartition(s, -self.top_n, axis=1)[:, -self.top_n :]  # [B, top_n], unordered
        order = np.argsort(-np.take_along_axis(s, top, axis=1), axis=1)
        return np.take_along_axis(top, order, axis=1)  # [B, top_n], best first
