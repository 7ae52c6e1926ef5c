"""The item-table rows one training step reads, gathered once, their gradient summed per row.

Read through `nn.Embedding(sparse=True)`, the output table gets a gradient of B + M rows, one per
candidate, repeated items included (at 40,000 items about a quarter of 2,304 candidates are
repeats); the optimiser must coalesce it (sort the rows, sum the repeats) before its non-linear
update, and the bias table and the input embedding likewise, every step. Here each table is read
through a leaf holding only its distinct rows [U, D]; the lookups are `index_select`s from that
leaf, whose backward is an `index_add` into it, so autograd sums the repeats as it goes and the
gradient handed to the optimiser is already coalesced. The update is the same (same rows, same
summed gradients), one sort of the step's indices replaces three coalesces, and nothing of
catalogue size is allocated per step.
"""

from __future__ import annotations

import torch
from torch import nn

from offline.model.gru import NextClickGRU


class _TableRows:
    """The distinct rows of one table read by one or more lookups, as a leaf that gathers their gradient."""

    def __init__(self, table: nn.Parameter, rows: torch.Tensor, inverse: torch.Tensor) -> None:
        self.table = table
        self.rows = rows  # int64 [U], sorted, distinct
        self.leaf = table.detach().index_select(0, rows).requires_grad_()  # [U, D]
        self.inverse = inverse  # int64 [N]: lookup k -> its row's place in `rows`

    def lookup(self, start: int, stop: int) -> torch.Tensor:
        """Rows of lookups start..stop-1: [stop - start, D], differentiable through the leaf."""
        return self.leaf.index_select(0, self.inverse[start:stop])

    def hand_over(self) -> None:
        """Put the summed gradient on the table as a coalesced sparse gradient (what the optimisers read)."""
        grad = self.leaf.grad
        if grad is None:
            return
        index = self.rows.unsqueeze(0)  # [1, U], sorted and distinct by construction: no check needed
        self.table.grad = torch.sparse_coo_tensor(index, grad, self.table.shape, is_coalesced=True, check_invariants=False)

    def current(self) -> torch.Tensor:
        """The rows' values as gathered, which are the table's until the optimiser writes them [U, D]."""
        return self.leaf.detach()


def _distinct(items: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    return torch.unique(items, sorted=True, return_inverse=True)  # [U], [N]


class StepRows:
    """Input embeddings [B, E], output rows [C, D] and biases [C, 1] of one step's clicks and candidates."""

    def __init__(self, model: NextClickGRU, inputs: torch.Tensor, candidates: torch.Tensor,
                 distinct: tuple[torch.Tensor, torch.Tensor] | None = None) -> None:
        """`distinct`: the candidates' (sorted distinct items [U], inverse [C]) where the caller has them already."""
        b, c = len(inputs), len(candidates)
        if model.output is None:  # tied: one table serves both lookups, their gradients add up per row
            both = _TableRows(model.embedding.weight, *_distinct(torch.cat([inputs, candidates])))
            self.tables = [both, _TableRows(model.output_bias.weight, *_distinct(candidates))]
            self.embedded = both.lookup(0, b)  # [B, E]
            self.weights = both.lookup(b, b + c)  # [C, D]
        else:
            rows, inverse = distinct or _distinct(candidates)  # shared by the output table and its bias
            out = _TableRows(model.output.weight, rows, inverse)
            self.tables = [_TableRows(model.embedding.weight, *_distinct(inputs)), out,
                           _TableRows(model.output_bias.weight, rows, inverse)]
            self.embedded = self.tables[0].lookup(0, b)  # [B, E]
            self.weights = out.lookup(0, c)  # [C, D]
        self.bias = self.tables[-1].lookup(0, c)  # [C, 1]

    def hand_over(self) -> None:
        """After backward: each table's gradient, coalesced, where the optimisers look for it."""
        for table in self.tables:
            table.hand_over()

    def gathered(self) -> dict[torch.Tensor, torch.Tensor]:
        """Table -> the rows its gradient covers as gathered for this step (RowAdagrad.step's `gathered`):
        the optimiser updates them in place instead of gathering them again. Valid until a table changes."""
        return {t.table: t.current() for t in self.tables if t.leaf.grad is not None}
