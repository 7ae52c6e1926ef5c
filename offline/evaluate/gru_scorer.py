"""The PyTorch GRU as a `SessionScorer`, for validation during training and offline evaluation."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from service.errors import ArtifactError
from offline.model.gru import NextClickGRU, load_checkpoint


class TorchGRUScorer:
    """Scores every item after each click, n sessions side by side, in eval mode without autograd."""

    def __init__(self, model: NextClickGRU, name: str) -> None:
        self.model = model
        self.name = name
        self.n_items = model.config.n_items
        self._hidden = model.init_hidden(0)  # [L, n, H]

    def begin(self, n_sessions: int) -> None:
        self.model.eval()  # dropout off; the trainer switches back to train() for its next epoch
        self._hidden = self.model.init_hidden(n_sessions)  # [L, n, H]

    def advance(self, items: np.ndarray) -> np.ndarray:
        with torch.no_grad():
            x = torch.from_numpy(np.ascontiguousarray(items, dtype=np.int64))  # [n]
            features, self._hidden = self.model.step(x, self._hidden)  # [n, D], [L, n, H]
            return self.model.score_all(features).numpy()  # float32 [n, n_items]


def load_torch_scorer(path: Path) -> TorchGRUScorer:
    """Rebuild the scorer from a `cairn train` checkpoint; named gru-<loss> after its training loss."""
    path = Path(path)
    if not path.is_file():
        raise ArtifactError(f"{path}: no checkpoint here")
    try:
        model, extra = load_checkpoint(path)
    except Exception as exc:  # torch raises many kinds for a file that is not a checkpoint
        raise ArtifactError(f"{path}: not a readable GRU checkpoint ({exc.__class__.__name__}: {exc})") from exc
    loss = extra.get("hyperparameters", {}).get("loss")
    if not isinstance(loss, str):
        raise ArtifactError(f"{path}: checkpoint has no training loss in extra['hyperparameters'] (not written by cairn train)")
    return TorchGRUScorer(model, f"gru-{loss}")
