"""The ranking losses against their published formulas, worked by hand on a small example.

Sources: BPR, Rendle et al., UAI 2009, as used for sessions by Hidasi et al., ICLR 2016
(mean over negatives of -log sigmoid(r_pos - r_neg)); TOP1, Hidasi et al., ICLR 2016 (mean of
sigmoid(r_neg - r_pos) + sigmoid(r_neg^2)); BPR-max and TOP1-max, Hidasi and Karatzoglou,
CIKM 2018 (softmax over the negatives as weights); cross-entropy against PyTorch's
`torch.nn.functional.cross_entropy`; gradients against `torch.autograd.gradcheck`.
"""

from __future__ import annotations

import math

import pytest
import torch
import torch.nn.functional as F

from offline.model.losses import LOSS_NAMES, get_loss, negative_mask

# Two session slots with targets items 5 and 7, then two sampled items 7 and 9: column 2 holds
# item 7 again, a collision with row 1's target, so row 1's negatives are columns 0 and 3 only.
TARGETS = torch.tensor([5, 7])
CANDIDATES = torch.tensor([5, 7, 7, 9])
SCORES = [[1.0, 0.5, -0.3, 2.0], [0.2, 1.5, 0.8, -1.0]]
NEGATIVE_COLUMNS = [[1, 2, 3], [0, 3]]  # worked out by hand from the items above
LAMBDA = 0.5


def sig(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def rows() -> list[tuple[float, list[float]]]:
    """(target score, negative scores) per row, read off the example by hand."""
    return [(SCORES[i][i], [SCORES[i][j] for j in NEGATIVE_COLUMNS[i]]) for i in range(2)]


def softmax(xs: list[float]) -> list[float]:
    e = [math.exp(x) for x in xs]
    return [v / sum(e) for v in e]


def by_hand(name: str) -> float:
    per_row = []
    for p, neg in rows():
        if name == "bpr":
            per_row.append(sum(-math.log(sig(p - r)) for r in neg) / len(neg))
        elif name == "top1":
            per_row.append(sum(sig(r - p) + sig(r * r) for r in neg) / len(neg))
        elif name == "bpr-max":
            s = softmax(neg)
            per_row.append(
                -math.log(sum(sj * sig(p - r) for sj, r in zip(s, neg))) + LAMBDA * sum(sj * r * r for sj, r in zip(s, neg))
            )
        elif name == "top1-max":
            s = softmax(neg)
            per_row.append(sum(sj * (sig(r - p) + sig(r * r)) for sj, r in zip(s, neg)))
        else:
            raise AssertionError(name)
    return sum(per_row) / len(per_row)


def scores(dtype: torch.dtype = torch.float64) -> torch.Tensor:
    return torch.tensor(SCORES, dtype=dtype, requires_grad=True)


def test_mask_excludes_the_target_its_duplicates_and_collisions() -> None:
    mask = negative_mask(TARGETS, CANDIDATES)
    assert mask.tolist() == [[0.0, 1.0, 1.0, 1.0], [1.0, 0.0, 0.0, 1.0]]


def test_mask_of_a_large_catalogue_compares_exactly() -> None:
    # 2**24 + 1 rounds to 2**24 in float32; the mask must still tell the two items apart.
    mask = negative_mask(torch.tensor([2**24]), torch.tensor([2**24, 2**24 + 1]))
    assert mask.tolist() == [[0.0, 1.0]]


def test_mask_without_in_batch_negatives_keeps_only_the_sampled_columns() -> None:
    # Same example, in-batch columns 0 and 1 off: row 0 keeps items 7 and 9, row 1 only item 9.
    mask = negative_mask(TARGETS, CANDIDATES, in_batch=False)
    assert mask.tolist() == [[0.0, 0.0, 1.0, 1.0], [0.0, 0.0, 0.0, 1.0]]


def test_cross_entropy_over_every_item_equals_pytorch_full_softmax() -> None:
    # Targets first, then every item once, in-batch columns off: each row's loss must be the
    # ordinary cross-entropy over the whole catalogue (torch.nn.functional.cross_entropy).
    torch.manual_seed(1)
    n_items, targets = 6, torch.tensor([2, 4, 2])
    candidates = torch.cat([targets, torch.arange(n_items)])  # [3 + 6]
    item_scores = torch.randn(3, n_items, dtype=torch.float64)  # [B, n_items]
    x = item_scores[:, candidates]  # [B, 9], column i of row i holds row i's target score
    loss = get_loss("cross-entropy")(x, negative_mask(targets, candidates, in_batch=False))
    assert loss.item() == pytest.approx(F.cross_entropy(item_scores, targets).item(), rel=1e-12)


@pytest.mark.parametrize("name", ["bpr", "top1", "bpr-max", "top1-max"])
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_value_equals_the_published_formula(name: str, dtype: torch.dtype) -> None:
    loss = get_loss(name, score_penalty=LAMBDA)(scores(dtype), negative_mask(TARGETS, CANDIDATES))
    assert loss.item() == pytest.approx(by_hand(name), rel=1e-6)


def test_cross_entropy_equals_pytorch_on_the_target_and_its_negatives() -> None:
    x = scores()
    loss = get_loss("cross-entropy")(x, negative_mask(TARGETS, CANDIDATES))
    per_row = []
    for i in range(2):
        logits = x[i, [i, *NEGATIVE_COLUMNS[i]]].detach()  # target first, then its negatives
        per_row.append(F.cross_entropy(logits.unsqueeze(0), torch.tensor([0])))
    assert loss.item() == pytest.approx(torch.stack(per_row).mean().item(), rel=1e-9)


@pytest.mark.parametrize("name", LOSS_NAMES)
def test_a_column_holding_the_target_item_counts_for_nothing(name: str) -> None:
    fn = get_loss(name, score_penalty=LAMBDA)
    mask = negative_mask(TARGETS, CANDIDATES)
    x = scores()
    base = fn(x, mask)
    (grad,) = torch.autograd.grad(base, x)
    assert grad[1, 2].item() == 0.0  # row 1, column 2 is item 7, row 1's own target
    moved = scores().detach()
    moved[1, 2] = 25.0
    assert fn(moved, mask).item() == pytest.approx(base.item(), rel=1e-12)


@pytest.mark.parametrize("name", LOSS_NAMES)
def test_gradient_matches_finite_differences(name: str) -> None:
    # The losses have hand-written backward passes; gradcheck compares them with numerical
    # derivatives in float64 (PyTorch's own reference check).
    torch.manual_seed(0)
    targets = torch.tensor([1, 2, 1, 3, 4])
    candidates = torch.cat([targets, torch.tensor([2, 7, 1, 8])])  # in-batch and sampled duplicates
    mask = negative_mask(targets, candidates)
    x = (torch.randn(5, 9, dtype=torch.float64) * 2).requires_grad_()
    fn = get_loss(name, score_penalty=0.7)
    assert torch.autograd.gradcheck(lambda y: fn(y, mask), (x,))


@pytest.mark.parametrize("name", LOSS_NAMES)
def test_no_negatives_gives_zero_loss_and_a_finite_zero_gradient(name: str) -> None:
    # Every candidate is the same item: no row has a negative, so there is nothing to rank.
    targets = torch.tensor([3, 3])
    candidates = torch.tensor([3, 3, 3])
    x = torch.randn(2, 3, dtype=torch.float64, requires_grad=True)
    loss = get_loss(name)(x, negative_mask(targets, candidates))
    (grad,) = torch.autograd.grad(loss, x)
    assert loss.item() == 0.0
    assert torch.equal(grad, torch.zeros_like(grad))


@pytest.mark.parametrize("name", LOSS_NAMES)
def test_raising_the_target_score_lowers_the_loss(name: str) -> None:
    fn = get_loss(name, score_penalty=LAMBDA)
    mask = negative_mask(TARGETS, CANDIDATES)
    low, high = scores().detach(), scores().detach()
    high[0, 0] += 1.0
    assert fn(high, mask).item() < fn(low, mask).item()


def test_extreme_scores_stay_finite() -> None:
    # Target far below its negatives: every sigmoid(r_p - r_j) underflows in float32.
    x = torch.tensor([[-60.0, 40.0, 45.0], [0.0, 50.0, 48.0]], requires_grad=True)
    mask = negative_mask(torch.tensor([1, 2]), torch.tensor([1, 2, 3]))
    for name in LOSS_NAMES:
        loss = get_loss(name)(x, mask)
        (grad,) = torch.autograd.grad(loss, x)
        assert math.isfinite(loss.item()) and torch.isfinite(grad).all(), name
    # BPR-max in that limit: sum_j s_j sigma_j^2 / A -> 0, so dL/dr_p -> -1 per row, times the row share 1/2.
    (grad,) = torch.autograd.grad(get_loss("bpr-max")(x, mask), x)
    assert grad[0, 0].item() == pytest.approx(-0.5, abs=1e-6)


def test_unknown_loss_is_refused_by_name() -> None:
    with pytest.raises(ValueError, match="'hinge'"):
        get_loss("hinge")
