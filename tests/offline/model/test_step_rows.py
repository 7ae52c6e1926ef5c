"""The optimised training step against a straightforward one written with plain PyTorch.

Reference: lookups through `nn.Embedding(sparse=True)` (`model.step`, `model.score_candidates`, nn.GRU),
BPR-max written out with autograd from its published formula (Hidasi and Karatzoglou, CIKM 2018,
eq. 8: -log sum_j s_j sigmoid(r_p - r_j) + lambda sum_j s_j r_j^2, s = softmax over the
negatives), and `torch.optim.Adagrad` over every parameter. The optimised step (merged
columns, StepRows, the GRU cell and the loss with hand-written backward passes, RowAdagrad) must
give the same loss, the same gradients and the same parameters after the update, up to float32
rounding.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from offline.model.gru import GRUConfig, NextClickGRU, score_rows
from offline.model.losses import get_loss, negative_mask
from offline.model.row_adagrad import RowAdagrad, write_rows
from offline.model.step_columns import merge_columns
from offline.model.session_batches import NegativeSampler, SessionParallelBatches, sampling_weights
from offline.model.step_rows import StepRows
from offline.model.train import build_optimizers, train_epoch
from offline.data.dataset import SessionSplit

N_ITEMS, B, M = 60, 8, 24


def reference_bpr_max(scores: torch.Tensor, targets: torch.Tensor, candidates: torch.Tensor, reg: float = 1.0) -> torch.Tensor:
    """BPR-max by its formula with autograd; negatives = candidates that are not the row's target."""
    neg = candidates.unsqueeze(0) != targets.unsqueeze(1)  # [B, C]
    s = torch.softmax(scores.masked_fill(~neg, float("-inf")), dim=1)  # [B, C]
    pos = scores.diagonal().unsqueeze(1)  # [B, 1]
    rows = -torch.log((s * torch.sigmoid(pos - scores)).sum(1)) + reg * (s * scores**2).sum(1)
    return rows.mean()


def model(tie: bool) -> NextClickGRU:
    torch.manual_seed(3)
    return NextClickGRU(GRUConfig(n_items=N_ITEMS, embedding_size=6, hidden_size=6, tie_output=tie))


def step_inputs(seed: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    inputs = torch.randint(0, N_ITEMS, (B,), generator=g)
    targets = torch.randint(0, N_ITEMS, (B,), generator=g)
    negatives = torch.randint(0, N_ITEMS // 3, (M,), generator=g)  # a small range: many repeats
    return inputs, targets, torch.cat([targets, negatives])


def reference_step(tie: bool) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor, NextClickGRU, torch.Tensor]:
    """The plain PyTorch step (nn.Embedding lookups, every candidate its own column) on step_inputs(0),
    its loss backpropagated: (inputs, targets, candidates, hidden, model, loss)."""
    inputs, targets, candidates = step_inputs(0)
    hidden = torch.randn(1, B, 6, generator=torch.Generator().manual_seed(1))
    ref = model(tie)
    f, _ = ref.step(inputs, hidden)
    ref_loss = reference_bpr_max(ref.score_candidates(f, candidates), targets, candidates)
    ref_loss.backward()
    return inputs, targets, candidates, hidden, ref, ref_loss


@pytest.mark.parametrize("tie", [False, True], ids=["separate-output", "tied-output"])
def test_step_rows_give_the_reference_loss_and_gradients(tie: bool) -> None:
    inputs, targets, candidates, hidden, ref, ref_loss = reference_step(tie)
    fast = model(tie)
    rows = StepRows(fast, inputs, candidates)
    f, _ = fast.recur(rows.embedded, hidden)
    loss = get_loss("bpr-max")(score_rows(f, rows.weights, rows.bias), negative_mask(targets, candidates))
    loss.backward()
    rows.hand_over()
    assert_same_step(ref, ref_loss, fast, loss)


def assert_same_step(ref: NextClickGRU, ref_loss: torch.Tensor, fast: NextClickGRU, loss: torch.Tensor) -> None:
    torch.testing.assert_close(loss, ref_loss)
    for (name, p), q in zip(ref.named_parameters(), fast.parameters()):
        if p.grad.is_sparse:
            assert q.grad.is_sparse and q.grad.is_coalesced(), name
            torch.testing.assert_close(q.grad.to_dense(), p.grad.to_dense(), msg=name)  # to_dense sums repeats
        else:
            torch.testing.assert_close(q.grad, p.grad, msg=name)


@pytest.mark.parametrize("tie", [False, True], ids=["separate-output", "tied-output"])
def test_the_trainers_step_gives_the_reference_loss_and_gradients(tie: bool) -> None:
    # As train_epoch runs it: repeats merged into counted columns (step_columns), their distinct rows
    # handed to StepRows, the GRU through gru_cell; the reference is the plain step above.
    inputs, targets, candidates, hidden, ref, ref_loss = reference_step(tie)
    fast = model(tie)
    columns = merge_columns(targets, candidates[B:])
    assert len(columns.items) < len(candidates)  # the example has repeats to merge
    rows = StepRows(fast, inputs, columns.items, (columns.rows, columns.inverse))
    f, _ = fast.recur(rows.embedded, hidden, hand_backward=True)
    loss = get_loss("bpr-max")(score_rows(f, rows.weights, rows.bias), columns.negatives, columns.counts)
    loss.backward()
    rows.hand_over()
    assert_same_step(ref, ref_loss, fast, loss)


@pytest.mark.parametrize("pass_gathered", [False, True], ids=["gathers-itself", "rows-handed-in"])
def test_row_adagrad_updates_like_torch_adagrad(pass_gathered: bool) -> None:
    # torch.optim.Adagrad (its default, non-fused path) is the reference: coalesced sparse gradients on a
    # table, several steps, rows repeating, and a dense parameter updated in the same call.
    table, dense = torch.randn(N_ITEMS, 4), torch.randn(3, 5)
    ours, theirs = torch.nn.Parameter(table.clone()), torch.nn.Parameter(table.clone())
    ours_dense, theirs_dense = torch.nn.Parameter(dense.clone()), torch.nn.Parameter(dense.clone())
    row_opt = RowAdagrad([ours, ours_dense], lr=0.3)
    torch_opt = torch.optim.Adagrad([theirs, theirs_dense], lr=0.3)
    g = torch.Generator().manual_seed(5)
    for _ in range(4):
        rows = torch.unique(torch.randint(0, 20, (9,), generator=g))
        grad = torch.sparse_coo_tensor(rows.unsqueeze(0), torch.randn(len(rows), 4, generator=g), table.shape, check_invariants=True).coalesce()
        dense_grad = torch.randn(3, 5, generator=g)
        ours.grad, theirs.grad = grad.clone(), grad.clone()
        ours_dense.grad, theirs_dense.grad = dense_grad.clone(), dense_grad.clone()
        row_opt.step(gathered={ours: ours.detach()[rows].clone()} if pass_gathered else None)
        torch_opt.step()
        torch.testing.assert_close(ours, theirs)
        torch.testing.assert_close(ours_dense, theirs_dense)
    ours.grad = torch.sparse_coo_tensor(torch.tensor([[1, 1]]), torch.ones(2, 4), table.shape)  # a repeat: not coalesced
    with pytest.raises(ValueError, match="coalesced sparse"):
        row_opt.step()


def test_write_rows_is_index_copy() -> None:
    # torch's index_copy_ is the reference, on a contiguous table (the numpy path) and a strided one.
    table = torch.randn(10, 3)
    rows, values = torch.tensor([7, 2, 4]), torch.randn(3, 3)
    for t in (table.clone(), table.clone().t().contiguous().t()):
        expected = t.clone().index_copy_(0, rows, values)
        write_rows(t, rows, values)
        assert torch.equal(t, expected)


def test_train_epoch_follows_the_reference_loop() -> None:
    # A few steps of train_epoch (StepRows + hand-written loss + RowAdagrad) against the same steps
    # run the straightforward way (nn.Embedding lookups, autograd loss, torch.optim.Adagrad).
    rng = np.random.default_rng(0)
    split = SessionSplit.from_sessions([list(rng.integers(0, N_ITEMS, rng.integers(2, 6))) for _ in range(200)])
    weights = sampling_weights(np.bincount(split.items, minlength=N_ITEMS), 0.75)
    batches = SessionParallelBatches(split, B)

    fast = model(False)
    sampler = NegativeSampler(weights, M, seed=0)
    steps = [step for _, step in zip(range(5), batches)]
    stats = train_epoch(fast, steps, sampler, get_loss("bpr-max"), build_optimizers(fast, "adagrad", 0.1), B)

    ref = model(False)
    sampler = NegativeSampler(weights, M, seed=0)
    opt = torch.optim.Adagrad(ref.parameters(), lr=0.1)
    hidden, ref_losses = ref.init_hidden(B), []
    for step in steps:
        hidden = hidden.masked_fill(torch.from_numpy(step.reset).view(1, B, 1), 0.0)
        targets = torch.from_numpy(step.targets)
        candidates = torch.cat([targets, sampler.draw()])
        f, hidden = ref.step(torch.from_numpy(step.inputs), hidden)
        loss = reference_bpr_max(ref.score_candidates(f, candidates), targets, candidates)
        opt.zero_grad()
        loss.backward()
        opt.step()
        hidden = hidden.detach()
        ref_losses.append(loss.item())
    assert stats.loss == pytest.approx(np.mean(ref_losses), rel=1e-5)
    for (name, p), q in zip(ref.named_parameters(), fast.parameters()):
        torch.testing.assert_close(q, p, rtol=1e-4, atol=1e-5, msg=name)
