"""The score columns of one sampled training step: the B targets, then each other sampled item once.

A step's candidates are its B targets followed by M sampled items; with popularity sampling many
are repeats (at 40,000 items, 2,048 negatives drawn by popularity**0.75 and B = 256, some 540 of
the 2,304 candidates). Every loss counts a negative column once per copy, and copies of one item
have the same score, so a column standing for k copies weighted by k gives the same loss and the
same gradient as the k columns (a softmax over the negatives takes w_j exp(r_j), a mean over
them w_j f(r_j) / sum w). Merged, the score product, every loss pass over [B, C] and the backward
product shrink by that share (C about 1,790 instead of 2,304).

The targets keep their own columns, in row order, so row i's target stays in column i (the
losses read it off the diagonal); a target repeated among the targets keeps its columns, each
counting 1. A sampled copy of a target item is added to the count of that item's first target
column; every other sampled item gets one column after the targets. Column j is a negative of
row i unless it holds row i's target item (only target columns can: sampled columns hold no
target item), which is the float 0/1 mask of losses.negative_mask.
"""

from __future__ import annotations

from typing import NamedTuple

import torch


class StepColumns(NamedTuple):
    items: torch.Tensor  # int64 [C]: the B targets, then the sampled items not among them, once each, sorted
    counts: torch.Tensor  # float32 [C]: how many of the step's B + M candidates column j stands for
    negatives: torch.Tensor  # float32 [B, C]: 1 where column j is a negative of row i (losses.negative_mask)
    rows: torch.Tensor  # int64 [U]: the distinct items of the columns, sorted
    inverse: torch.Tensor  # int64 [C]: column j holds rows[inverse[j]]


def merge_columns(targets: torch.Tensor, sampled: torch.Tensor) -> StepColumns:
    """targets int64 [B], sampled int64 [M] -> the step's columns, repeats of an item merged into one."""
    b = len(targets)
    rows, inverse, counts = torch.unique(torch.cat([targets, sampled]), sorted=True, return_inverse=True,
                                         return_counts=True)  # [U], [B + M], [U]
    of_target = inverse[:b]  # [B]
    first = torch.full_like(rows, b).scatter_reduce_(0, of_target, torch.arange(b), "amin")  # [U], b where none
    is_target = first < b  # [U]
    sampled_copies = counts - torch.bincount(of_target, minlength=len(rows))  # [U]
    target_counts = torch.ones(b, dtype=torch.int64)
    target_counts[first[is_target]] += sampled_copies[is_target]  # positions distinct: one first column per item
    others = torch.nonzero(~is_target).squeeze(1)  # [C - B], places in `rows` of the sampled-only items
    column_counts = torch.cat([target_counts, counts[others]]).to(torch.float32)  # [C]
    negatives = torch.ones(b, b + len(others))  # [B, C]
    negatives[:, :b] = (of_target.unsqueeze(0) != of_target.unsqueeze(1)).to(torch.float32)
    items = torch.cat([targets, rows[others]])  # [C]
    return StepColumns(items, column_counts, negatives, rows, torch.cat([of_target, others]))
