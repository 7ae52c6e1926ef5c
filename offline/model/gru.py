"""The GRU next-click model (PyTorch, CPU).

One click in, one step of the recurrence, scores over items out:

    e = E[item]                         item embedding          [B, E]
    h_l' = GRU_l(x_l, h_l)              L stacked GRU layers     [L, B, H]
    f = tanh(W_k ... tanh(W_1 h_L'))    optional feed-forward    [B, D]
    score(j) = f . O[j] + b[j]          output item vectors      [B, n_items]

The output vectors O may be tied to the input embedding (then D must equal E). Embedding and
output tables are `nn.Embedding(sparse=True)` so that an optimiser step touches only the rows a
mini-batch used: with 40,000 items a dense update costs tens of ms whatever the batch size.
The checkpoint carries `GRUConfig`, so evaluation and export rebuild the model from it alone.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import nn

from offline.model.gru_cell import gru_step
from service.artifacts.format import RENAMED_HYPERPARAMETERS
from service.errors import InputDataError


@dataclass
class GRUConfig:
    n_items: int
    embedding_size: int = 100  # input item vector size
    hidden_size: int = 100  # GRU state size per layer
    layers: int = 1  # stacked GRU layers
    ff_sizes: list[int] = field(default_factory=list)  # tanh feed-forward layers after the GRU
    input_dropout: float = 0.0  # on the input embedding, training only
    state_dropout: float = 0.0  # on the GRU output, training only
    tie_output: bool = False  # output item vectors = input embedding

    @property
    def output_size(self) -> int:
        return self.ff_sizes[-1] if self.ff_sizes else self.hidden_size

    def validate(self) -> None:
        if self.n_items < 1:
            raise ValueError(f"n_items must be positive, got {self.n_items}")
        if self.tie_output and self.output_size != self.embedding_size:
            raise ValueError(
                f"tie_output needs the final layer size ({self.output_size}) to equal embedding_size ({self.embedding_size})"
            )


def _item_table(n_items: int, size: int) -> nn.Embedding:
    """An item table left uninitialised: nn.Embedding's own normal init is overwritten by
    reset_parameters or a checkpoint anyway (at a million items it cost seconds)."""
    return nn.Embedding(n_items, size, sparse=True, _weight=torch.empty(n_items, size))


class NextClickGRU(nn.Module):
    def __init__(self, config: GRUConfig, init: bool = True) -> None:
        """`init` False leaves the item tables uninitialised, for weights loaded next."""
        super().__init__()
        config.validate()
        self.config = config
        c = config
        self.embedding = _item_table(c.n_items, c.embedding_size)
        self.gru = nn.GRU(c.embedding_size, c.hidden_size, num_layers=c.layers)
        sizes = [c.hidden_size, *c.ff_sizes]
        self.ff = nn.ModuleList(nn.Linear(a, b) for a, b in zip(sizes[:-1], sizes[1:]))
        self.output = None if c.tie_output else _item_table(c.n_items, c.output_size)
        self.output_bias = _item_table(c.n_items, 1)
        self.drop_embedding = nn.Dropout(c.input_dropout)
        self.drop_hidden = nn.Dropout(c.state_dropout)
        if init:
            self.reset_parameters()

    def reset_parameters(self) -> None:
        # Small uniform init, as in common GRU recommender practice (from memory: +-sqrt(6/(fan_in+fan_out))).
        for p in self.parameters():
            if p.dim() >= 2:
                bound = (6.0 / (p.shape[0] + p.shape[1])) ** 0.5
                nn.init.uniform_(p, -bound, bound)
        nn.init.zeros_(self.output_bias.weight)

    @property
    def output_weight(self) -> torch.Tensor:
        return self.embedding.weight if self.output is None else self.output.weight  # [n_items, D]

    def init_hidden(self, batch_size: int) -> torch.Tensor:
        return torch.zeros(self.config.layers, batch_size, self.config.hidden_size)  # [L, B, H]

    def step(self, items: torch.Tensor, hidden: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """One click per session: items int64 [B], hidden [L, B, H] -> (features [B, D], new hidden [L, B, H])."""
        return self.recur(self.embedding(items), hidden)

    def recur(self, embedded: torch.Tensor, hidden: torch.Tensor, hand_backward: bool = False) -> tuple[torch.Tensor, torch.Tensor]:
        """`step` from the clicked items' embedding rows [B, E] (the trainer gathers them itself, see step_rows).

        `hand_backward`: the GRU step through gru_cell (the same equations, its gradient written out; the trainer's path)."""
        x = self.drop_embedding(embedded)  # [B, E]
        if hand_backward:
            out, hidden = gru_step(self.gru, x, hidden)  # [B, H], [L, B, H]
        else:
            out, hidden = self.gru(x.unsqueeze(0), hidden)  # out [1, B, H]
            out = out.squeeze(0)
        f = self.drop_hidden(out)  # [B, H]
        for layer in self.ff:
            f = torch.tanh(layer(f))  # [B, D]
        return f, hidden

    def score_all(self, features: torch.Tensor) -> torch.Tensor:
        """Scores of every item: [B, D] -> [B, n_items]."""
        return features @ self.output_weight.T + self.output_bias.weight.T

    def score_candidates(self, features: torch.Tensor, candidates: torch.Tensor) -> torch.Tensor:
        """Scores of a shared candidate set (sampled output): [B, D], [C] -> [B, C]."""
        w = self.output(candidates) if self.output is not None else self.embedding(candidates)  # [C, D]
        return score_rows(features, w, self.output_bias(candidates))


def score_rows(features: torch.Tensor, weights: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
    """features [B, D], the candidates' output rows [C, D] and bias rows [C, 1] -> scores [B, C]."""
    return torch.addmm(bias.view(1, -1), features, weights.T)  # the bias added inside the product, not as a pass of its own


def save_checkpoint(path: Path, model: NextClickGRU, extra: dict[str, Any] | None = None) -> None:
    """A checkpoint is self-describing: config, weights, and whatever the trainer adds (epoch, metrics)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(path.suffix + ".tmp")
    torch.save({"config": asdict(model.config), "state_dict": model.state_dict(), "extra": extra or {}}, tmp)
    tmp.replace(path)


def check_renamed_keys(keys: Any, where: str) -> None:
    """InputDataError naming the first old key in `keys` and its new name."""
    for old, new in RENAMED_HYPERPARAMETERS.items():
        if old in keys:
            raise InputDataError(f"{where}: written by an older cairn (key {old!r}, now {new!r}); train it again")


def load_checkpoint(path: Path) -> tuple[NextClickGRU, dict[str, Any]]:
    blob = torch.load(Path(path), map_location="cpu", weights_only=True)
    check_renamed_keys(blob["config"], str(path))
    check_renamed_keys(blob.get("extra", {}).get("hyperparameters", {}), str(path))
    model = NextClickGRU(GRUConfig(**blob["config"]), init=False)
    model.load_state_dict(blob["state_dict"])
    model.eval()
    return model, blob.get("extra", {})
