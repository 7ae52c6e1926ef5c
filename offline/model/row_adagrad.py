"""Adagrad for the item tables: the update of `torch.optim.Adagrad` on the rows a step touched.

For a sparse gradient, torch.optim.Adagrad coalesces it, then builds sparse tensors three times
over (the squared gradient added to the state, the state masked back to the rows, the step added
to the parameter), each through generic sparse kernels: about 2 ms a step for the two item tables
at 40,000 items, 2,304 candidates, hidden 100, for some 1,700 rows of work. The same update reads
and writes those rows directly:

    sum[r] += g_r * g_r;   w[r] -= lr * g_r / (sqrt(sum[r]) + eps)

which is torch's rule with its defaults (lr_decay 0, weight_decay 0, initial_accumulator_value 0,
eps 1e-10; the rule as in Duchi et al., JMLR 2011). The rows are gathered, updated by torch's
functional Adagrad (fused: one kernel for all tables, instead of four passes per table) and
written back. Gradients must be sparse and coalesced, as step_rows hands them over; a dense
gradient is refused rather than silently read row by row.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

import torch
from torch.optim.adagrad import adagrad

EPS = 1e-10  # torch.optim.Adagrad's default


class RowAdagrad(torch.optim.Optimizer):
    def __init__(self, params: Iterable[torch.Tensor], lr: float, eps: float = EPS) -> None:
        if not lr > 0:
            raise ValueError(f"lr must be positive, got {lr}")
        super().__init__(params, {"lr": lr, "eps": eps})

    @torch.no_grad()
    def step(self, closure: Callable[[], float] | None = None) -> float | None:  # type: ignore[override]
        loss = closure() if closure is not None else None
        for group in self.param_groups:
            tables, rows, weights, sums, grads, steps = [], [], [], [], [], []
            for p in group["params"]:
                if p.grad is None:
                    continue
                grad = p.grad
                if not (grad.is_sparse and grad.is_coalesced()):
                    raise ValueError("RowAdagrad takes coalesced sparse gradients (see offline.model.step_rows)")
                state = self.state[p]
                if not state:
                    state["sum"] = torch.zeros_like(p, memory_format=torch.preserve_format)  # [n_items, D]
                    state["step"] = torch.zeros((), dtype=torch.float32)  # the kernel counts steps (lr_decay 0: unused)
                tables.append(p)
                rows.append(grad._indices()[0])  # [U]
                grads.append(grad._values())  # [U, D]
                weights.append(p.index_select(0, rows[-1]))  # [U, D]
                sums.append(state["sum"].index_select(0, rows[-1]))  # [U, D]
                steps.append(state["step"])
            if not tables:
                continue
            # torch's own Adagrad on the gathered rows, every table in one fused kernel call.
            adagrad(weights, grads, sums, steps, fused=True, lr=group["lr"], weight_decay=0.0, lr_decay=0.0,
                    eps=group["eps"], maximize=False)
            # Rows are distinct, so writing them back is exact; index_add_ with alpha is several times slower.
            for p, r, w, total in zip(tables, rows, weights, sums):
                p.index_copy_(0, r, w)
                self.state[p]["sum"].index_copy_(0, r, total)
        return loss
