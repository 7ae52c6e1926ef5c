"""Merged score columns: the same loss and gradients as one column per candidate.

Reference: each loss over the unmerged candidates (targets then every sampled draw, one column
each, masked by losses.negative_mask), which tests/offline/model/test_losses.py checks against
the published formulas; gradients by autograd through both, and `torch.autograd.gradcheck`
(PyTorch's numerical derivatives) for the losses' hand-written backward with counts.
"""

from __future__ import annotations

import pytest
import torch

from offline.model.losses import LOSS_NAMES, get_loss, negative_mask
from offline.model.step_columns import merge_columns


def test_columns_worked_by_hand() -> None:
    # Targets 5, 7, 5; sampled 7, 9, 9, 2, 5, 9. Items 5 and 7 keep their target columns (0 and 1
    # count their sampled copies too), column 2 is the second target 5; then 2 once and 9 three times.
    columns = merge_columns(torch.tensor([5, 7, 5]), torch.tensor([7, 9, 9, 2, 5, 9]))
    assert columns.items.tolist() == [5, 7, 5, 2, 9]
    assert columns.counts.tolist() == [2.0, 2.0, 1.0, 1.0, 3.0]
    assert columns.negatives.tolist() == [[0.0, 1.0, 0.0, 1.0, 1.0], [1.0, 0.0, 1.0, 1.0, 1.0], [0.0, 1.0, 0.0, 1.0, 1.0]]
    assert columns.rows.tolist() == [2, 5, 7, 9]
    assert columns.rows[columns.inverse].tolist() == columns.items.tolist()
    assert columns.counts.sum().item() == 3 + 6  # every candidate draw is counted once


def test_nothing_sampled_leaves_the_targets() -> None:
    columns = merge_columns(torch.tensor([4, 1, 4]), torch.empty(0, dtype=torch.int64))
    assert columns.items.tolist() == [4, 1, 4] and columns.counts.tolist() == [1.0, 1.0, 1.0]


def random_step(seed: int, b: int = 6, m: int = 30, n_items: int = 12) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    return torch.randint(0, n_items, (b,), generator=g), torch.randint(0, n_items, (m,), generator=g)  # many repeats


@pytest.mark.parametrize("name", LOSS_NAMES)
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_merged_columns_give_the_loss_and_gradient_of_every_copy(name: str, seed: int) -> None:
    targets, sampled = random_step(seed)
    item_scores = (torch.randn(len(targets), 12, dtype=torch.float64, generator=torch.Generator().manual_seed(9)) * 2)
    fn = get_loss(name, score_penalty=0.6)

    ref_leaf = item_scores.clone().requires_grad_()  # [B, n_items]
    candidates = torch.cat([targets, sampled])
    ref = fn(ref_leaf[:, candidates], negative_mask(targets, candidates))
    ref.backward()

    leaf = item_scores.clone().requires_grad_()
    columns = merge_columns(targets, sampled)
    assert len(columns.items) < len(candidates)
    loss = fn(leaf[:, columns.items], columns.negatives, columns.counts)
    loss.backward()
    assert loss.item() == pytest.approx(ref.item(), rel=1e-12)
    torch.testing.assert_close(leaf.grad, ref_leaf.grad, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("name", LOSS_NAMES)
def test_gradient_with_counts_matches_finite_differences(name: str) -> None:
    columns = merge_columns(*random_step(5))
    x = torch.randn(6, len(columns.items), dtype=torch.float64, generator=torch.Generator().manual_seed(2)).requires_grad_()
    fn = get_loss(name, score_penalty=0.7)
    assert torch.autograd.gradcheck(lambda y: fn(y, columns.negatives, columns.counts), (x,))
