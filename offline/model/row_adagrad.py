"""Adagrad for the whole model in one fused call: item tables on the rows a step touched, the rest whole.

For a sparse gradient, torch.optim.Adagrad coalesces it, then builds sparse tensors three times
over (the squared gradient added to the state, the state masked back to the rows, the step added
to the parameter), each through generic sparse kernels: about 2 ms a step for the two item tables
at 40,000 items, 2,304 candidates, hidden 100, for some 1,700 rows of work. The same update reads
and writes those rows directly:

    sum[r] += g_r * g_r;   w[r] -= lr * g_r / (sqrt(sum[r]) + eps)

which is torch's rule with its defaults (lr_decay 0, weight_decay 0, initial_accumulator_value 0,
eps 1e-10; the rule as in Duchi et al., JMLR 2011). The rows are gathered, updated by torch's
fused Adagrad kernel, the one `torch.optim.Adagrad(fused=True)` runs, and written back. Dense
parameters (the GRU's) go into the same kernel call whole: one call a step instead of a second
optimiser's (about 0.1 ms less at hidden 100, two threads).

Sparse gradients must be coalesced, as step_rows hands them over. `step(gathered=...)` takes the
rows' current values where the caller has gathered them already (StepRows did, to read them): one
random gather per table less, which at a million items (400 MB tables) is mostly cache misses.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping

import torch

EPS = 1e-10  # torch.optim.Adagrad's default


def write_rows(table: torch.Tensor, rows: torch.Tensor, values: torch.Tensor) -> None:
    """table[rows] = values for distinct rows, in place, outside autograd: [N, D], int64 [U], [U, D].

    Through numpy: its fancy assignment copies whole rows, where torch's index_copy_ computes an
    offset per element; about 40 us instead of 67 for 1,790 rows of 100 floats (two threads)."""
    if table.is_contiguous() and values.is_contiguous() and table.dtype == values.dtype:
        table.detach().numpy()[rows.numpy()] = values.detach().numpy()
    else:
        table.detach().index_copy_(0, rows, values)


class RowAdagrad(torch.optim.Optimizer):
    def __init__(self, params: Iterable[torch.Tensor], lr: float, eps: float = EPS) -> None:
        if not lr > 0:
            raise ValueError(f"lr must be positive, got {lr}")
        super().__init__(params, {"lr": lr, "eps": eps})

    @torch.no_grad()
    def step(self, closure: Callable[[], float] | None = None,  # type: ignore[override]
             gathered: Mapping[torch.Tensor, torch.Tensor] | None = None) -> float | None:
        """`gathered`: table -> its gradient's rows as they are now [U, D] (same rows, same order); they are
        updated in place and written back. A table missing from it is gathered here."""
        loss = closure() if closure is not None else None
        for group in self.param_groups:
            params, grads, sums, steps, writes = [], [], [], [], []
            for p in group["params"]:
                if p.grad is None:
                    continue
                grad = p.grad
                state = self.state[p]
                if not state:
                    state["sum"] = torch.zeros_like(p, memory_format=torch.preserve_format)  # like p
                    state["step"] = torch.zeros((), dtype=torch.float32)  # the kernel counts steps (lr_decay 0: unused)
                steps.append(state["step"])
                if not grad.is_sparse:  # a dense gradient: torch's dense rule on the whole tensor
                    params.append(p)
                    grads.append(grad)
                    sums.append(state["sum"])
                    continue
                if not grad.is_coalesced():
                    raise ValueError("RowAdagrad takes coalesced sparse gradients (see offline.model.step_rows)")
                rows = grad._indices()[0]  # [U]
                current = gathered.get(p) if gathered is not None else None
                params.append(p.index_select(0, rows) if current is None else current)  # [U, D]
                grads.append(grad._values())  # [U, D]
                sums.append(state["sum"].index_select(0, rows))  # [U, D]
                writes.append((p, state["sum"], rows, params[-1], sums[-1]))
            if not params:
                continue
            # What torch.optim.adagrad's fused path runs, without its regrouping by device and dtype
            # (CPU float32 throughout here): every tensor in one kernel call.
            torch._foreach_add_(steps, 1)
            torch._fused_adagrad_(params, grads, sums, steps, lr=group["lr"], lr_decay=0.0, weight_decay=0.0,
                                  eps=group["eps"], maximize=False)
            for p, total, rows, new_rows, new_sums in writes:  # rows are distinct: writing back is exact
                write_rows(p, rows, new_rows)
                write_rows(total, rows, new_sums)
        return loss
