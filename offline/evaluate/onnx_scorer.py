"""An exported artifact as a `SessionScorer`, so the served graph goes through the same evaluation
as the PyTorch model and the baselines (and any difference between them shows up there)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from service.artifacts.format import STEP_GRAPH, verify_artifact
from service.runtime.onnx_step import OnnxStep


class OnnxScorer:
    def __init__(self, step: OnnxStep, name: str) -> None:
        self.name = name
        self.n_items = step.n_items
        self._step = step
        self._hidden = step.zero_hidden(0)  # [L, B, H]

    def begin(self, n_sessions: int) -> None:
        self._hidden = self._step.zero_hidden(n_sessions)  # [L, n, H]

    def advance(self, items: np.ndarray) -> np.ndarray:
        items = np.ascontiguousarray(items, dtype=np.int64)  # [n]
        self._hidden, scores = self._step.run_scores(items, self._hidden)  # [L, n, H], [n, n_items]
        return scores


def load_onnx_scorer(path: Path, threads: int = 1) -> OnnxScorer:
    """The artifact folder at `path`, verified, as a scorer named after its training loss."""
    path = Path(path)
    manifest = verify_artifact(path)
    hyperparameters = manifest.get("hyperparameters") or {}
    loss = hyperparameters.get("loss") if isinstance(hyperparameters, dict) else None
    name = f"gru-{loss}-onnx" if isinstance(loss, str) and loss else "gru-onnx"
    return OnnxScorer(OnnxStep(path / STEP_GRAPH, threads=threads), name)
