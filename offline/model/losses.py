"""Ranking losses for sampled next-click training.

Every loss takes a score matrix and a mask from one session-parallel step:

    scores    float [B, C]  row i scores the candidates for session slot i; C = B + M
    negatives float [B, C]  1 where column j counts as a negative of row i, else 0

Column i of row i is row i's target (the candidates are the step's B targets followed by M
sampled items), so the positive score of row i is ``scores[i, i]``. A column holding the same
item as the row's target (the diagonal, an in-batch duplicate, a sampled collision) is never a
negative: `negative_mask` leaves it out. The batch loss is the mean over rows that have at least
one negative; a row without any (every candidate is its own item) carries no ranking signal.

Formulas (r_p: the target's score, r_j: a negative's, N_i: the negatives of row i):
    bpr            mean_j -log sigmoid(r_p - r_j)                          (Hidasi et al., 2016)
    top1           mean_j sigmoid(r_j - r_p) + sigmoid(r_j^2)             (Hidasi et al., 2016)
    cross-entropy  -log softmax(r)_p over the target and its negatives
    bpr-max        -log sum_j s_j sigmoid(r_p - r_j) + lambda sum_j s_j r_j^2
    top1-max       sum_j s_j (sigmoid(r_j - r_p) + sigmoid(r_j^2))
with s = softmax of the scores over N_i only (Hidasi and Karatzoglou, 2018).

Why hand-written backward passes: the score matrix is the largest tensor of a training step
([512, 2560] with 2,048 negatives), and autograd through these formulas makes many passes over
it, the largest share of a step. Each loss below is one `autograd.Function` whose gradient is the
closed form derived beside it. Mask, loss and gradient on one thread at [512, 2560], autograd
against these: bpr-max 19 -> 5 ms, top1-max 11 -> 6.5, top1 7 -> 5, bpr 6 -> 3.5, cross-entropy
4.8 -> 3. tests/offline/test_losses.py checks every value against its published formula and
every gradient with `torch.autograd.gradcheck`.

Merged columns: `counts` float [C] (optional) says how many candidates column j stands for
(step_columns merges the repeats of a sampled item into one column). A negative column then
counts w_j = counts_j times: in the means of BPR and TOP1 (sum_j w_j f(r_j) / sum_j w_j) and in
the softmax of BPR-max, TOP1-max and cross-entropy (w_j exp(r_j) / sum w exp(r), taken as a
log(w_j) added to the logit). That is the loss over the unmerged columns, and its gradient per
merged column is the sum over the copies; the backward formulas below hold for any positive w.
"""

from __future__ import annotations

from typing import Any, Protocol

import torch
import torch.nn.functional as F


class LossFn(Protocol):
    """scores [B, C], negatives [B, C], counts [C] or None (see "Merged columns" above) -> the batch loss."""

    def __call__(self, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None) -> torch.Tensor: ...


LOSS_NAMES = ("top1", "bpr", "cross-entropy", "bpr-max", "top1-max")

# Stands in for -inf in masked logits: exp() of it is exactly 0, yet a row with every column
# masked stays finite (a uniform softmax) instead of 0/0; such rows get weight 0, never NaN.
_MASKED_LOGIT = -1.0e30


def negative_mask(targets: torch.Tensor, candidates: torch.Tensor, in_batch: bool = True) -> torch.Tensor:
    """targets int64 [B], candidates int64 [C] -> float32 [B, C], 1 where candidate j is not row i's target.

    `in_batch` False: the first B columns (the step's targets) are never negatives, only the
    sampled ones are. With every item among the sampled columns this makes each row's negatives
    exactly the other items, once each: the full-catalogue loss, with no item counted twice.

    A float 0/1 mask rather than a bool one: on CPU, torch's bool-producing comparisons and
    bool reductions run several times slower than float arithmetic over a [512, 2560] matrix.
    Item indices are exact in float32 below 2**24; larger catalogues compare in float64.
    """
    ids = torch.float32 if int(candidates.max()) < 2**24 else torch.float64
    diff = candidates.to(ids).unsqueeze(0) - targets.to(ids).unsqueeze(1)  # [B, C], whole numbers
    mask = diff.abs_().clamp_(max=1.0).to(torch.float32)  # 0 where equal, else 1
    if not in_batch:
        mask[:, : len(targets)] = 0.0
    return mask


def _positive(scores: torch.Tensor) -> torch.Tensor:
    return scores.diagonal().unsqueeze(1)  # [B, 1]


def _row_share(negatives: torch.Tensor) -> torch.Tensor:
    """Weight of each row in the batch mean [B]: 1/(rows with a negative), 0 for a row without any."""
    has = (negatives.amax(1) > 0).to(negatives.dtype)  # [B]
    return has / has.sum().clamp(min=1.0)


def _row_weights(negatives: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """(count of negatives [B], at least 1; weight of each row in the batch mean [B])."""
    return negatives.sum(1).clamp(min=1.0), _row_share(negatives)


def _masked_logits(scores: torch.Tensor, keep: torch.Tensor) -> torch.Tensor:
    """scores where keep is 1, about -1e30 where it is 0 (the product (keep - 1) * 1e30 is exactly 0 on kept columns)."""
    return (keep - 1.0).mul_(-_MASKED_LOGIT).add_(scores)  # [B, C]


def _weighted(negatives: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
    return negatives if counts is None else negatives * counts.to(negatives.dtype)  # [B, C]


def _weighted_logits(scores: torch.Tensor, keep: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
    """Masked logits plus log(count) per column: the softmax over them is w_j exp(r_j) / sum w exp(r)."""
    logits = _masked_logits(scores, keep)  # [B, C]
    return logits if counts is None else logits.add_(counts.to(scores.dtype).log())


def _dsigmoid(s: torch.Tensor) -> torch.Tensor:
    """sigma'(x) from s = sigma(x): s (1 - s)."""
    return s * (1.0 - s)


class _BPR(torch.autograd.Function):
    # L_i = 1/n_i sum_j w_j softplus(r_j - r_p)     (-log sigmoid(x) = softplus(-x))
    # dL_i/dr_j = w_j sigmoid(r_j - r_p) / n_i;  dL_i/dr_p = -sum_j of those
    @staticmethod
    def forward(ctx: Any, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
        w = _weighted(negatives.to(scores.dtype), counts)
        n, rho = _row_weights(w)
        d = scores - _positive(scores)  # [B, C]
        loss = ((F.softplus(d) * w).sum(1) / n * rho).sum()
        ctx.save_for_backward(d, w, rho / n)
        return loss

    @staticmethod
    def backward(ctx: Any, grad_out: torch.Tensor) -> tuple[torch.Tensor, None, None]:
        d, w, coef = ctx.saved_tensors
        grad = torch.sigmoid(d).mul_(w).mul_((coef * grad_out).unsqueeze(1))  # [B, C]
        grad.diagonal().sub_(grad.sum(1))  # the target column has w = 0, so it holds only this
        return grad, None, None


class _TOP1(torch.autograd.Function):
    # L_i = 1/n_i sum_j w_j (a_j + b_j),  a_j = sigmoid(r_j - r_p), b_j = sigmoid(r_j^2)
    # dL_i/dr_j = w_j (a_j' + 2 r_j b_j') / n_i;  dL_i/dr_p = -sum_j w_j a_j' / n_i
    @staticmethod
    def forward(ctx: Any, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
        w = _weighted(negatives.to(scores.dtype), counts)
        n, rho = _row_weights(w)
        a = torch.sigmoid(scores - _positive(scores))  # [B, C]
        b = torch.sigmoid(scores * scores)  # [B, C]
        loss = (((a + b) * w).sum(1) / n * rho).sum()
        ctx.save_for_backward(scores, a, b, w, rho / n)
        return loss

    @staticmethod
    def backward(ctx: Any, grad_out: torch.Tensor) -> tuple[torch.Tensor, None]:
        scores, a, b, w, coef = ctx.saved_tensors
        ga = _dsigmoid(a).mul_(w)  # [B, C]
        to_target = ga.sum(1)  # [B]
        grad = _dsigmoid(b).mul_(scores).mul_(2.0).mul_(w).add_(ga)  # [B, C]
        grad.diagonal().sub_(to_target)
        return grad.mul_((coef * grad_out).unsqueeze(1)), None, None


class _CrossEntropy(torch.autograd.Function):
    # L_i = -log p_i,  p = softmax over the target and its negatives;  dL_i/dr = p - onehot(i)
    @staticmethod
    def forward(ctx: Any, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
        negatives = negatives.to(scores.dtype)
        rho = _row_share(negatives)
        keep = negatives.clone()
        keep.diagonal().fill_(1.0)
        logits = _weighted_logits(scores, keep, counts)  # [B, C]
        if counts is not None:  # the target column counts once, whatever else it stands for
            logits.diagonal().sub_(counts[: len(scores)].to(scores.dtype).log())
        log_p = torch.log_softmax(logits, dim=1)  # [B, C]
        ctx.save_for_backward(log_p, rho)
        return -(log_p.diagonal() * rho).sum()

    @staticmethod
    def backward(ctx: Any, grad_out: torch.Tensor) -> tuple[torch.Tensor, None]:
        log_p, rho = ctx.saved_tensors
        grad = log_p.exp()  # [B, C]
        grad.diagonal().sub_(1.0)
        return grad.mul_((rho * grad_out).unsqueeze(1)), None, None


class _BPRMax(torch.autograd.Function):
    # L_i = -log A + lambda R,  A = sum_j s_j sigma_j,  R = sum_j s_j r_j^2,  sigma_j = sigmoid(r_p - r_j)
    # with ds_j/dr_k = s_j (delta_jk - s_k):
    #   dL_i/dr_k = s_k (1 + lambda (r_k^2 + 2 r_k - R)) - q_k,   q_k = s_k sigma_k^2 / A
    #   dL_i/dr_p = sum_j q_j - 1
    # Backward takes it as s_k (1 - lambda R) + lambda (s_k r_k)(r_k + 2) - (s_k sigma_k^2) / A with the
    # per-row factors (and the batch weight rho) folded into [B, 1] coefficients: five passes over
    # [B, C] instead of eight, the largest tensors of the step.
    # A underflows only when the target scores some 88 below its strongest negatives (float32).
    # The 2018 code adds 1e-24 inside the log; here A is floored at the smallest normal float,
    # which caps the value (at 87 in float32) but keeps the gradient right in that limit:
    # q <= sigma -> 0, so the target is still pushed up with the full weight -1.
    @staticmethod
    def forward(ctx: Any, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None,
                reg: float) -> torch.Tensor:
        negatives = negatives.to(scores.dtype)
        rho = _row_share(negatives)
        s = torch.softmax(_weighted_logits(scores, negatives, counts), dim=1)  # [B, C], 0 off the negatives
        sigma = torch.sub(_positive(scores), scores).sigmoid_()  # [B, C]
        s_sigma = s * sigma  # [B, C]
        a = s_sigma.sum(1, keepdim=True).clamp_(min=torch.finfo(scores.dtype).tiny)  # [B, 1]
        sr = s * scores  # [B, C]
        r_reg = (sr * scores).sum(1, keepdim=True)  # [B, 1]
        loss = ((reg * r_reg - a.log()).squeeze(1) * rho).sum()
        ctx.save_for_backward(scores, s, sr, s_sigma.mul_(sigma), a, r_reg, rho)  # s_sigma becomes A q
        ctx.reg = reg
        return loss

    @staticmethod
    def backward(ctx: Any, grad_out: torch.Tensor) -> tuple[torch.Tensor, None, None, None]:
        scores, s, sr, aq, a, r_reg, rho = ctx.saved_tensors
        w = (rho * grad_out).unsqueeze(1)  # [B, 1]
        grad = s * (1.0 - ctx.reg * r_reg).mul_(w)  # [B, C]
        grad.addcmul_(aq, -w / a)  # - q_k
        grad.addcmul_(torch.add(scores, 2.0).mul_(sr), w * ctx.reg)  # + lambda s_k r_k (r_k + 2)
        # The target column has s = q = 0, so it holds only this.
        grad.diagonal().add_((aq.sum(1, keepdim=True) / a - 1.0).mul_(w).squeeze(1))
        return grad, None, None, None


class _TOP1Max(torch.autograd.Function):
    # L_i = sum_j s_j t_j,  t_j = a_j + b_j,  a_j = sigmoid(r_j - r_p),  b_j = sigmoid(r_j^2)
    #   dL_i/dr_k = s_k (t_k - L_i) + s_k (a_k' + 2 r_k b_k');   dL_i/dr_p = -sum_j s_j a_j'
    @staticmethod
    def forward(ctx: Any, scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None) -> torch.Tensor:
        negatives = negatives.to(scores.dtype)
        rho = _row_share(negatives)
        s = torch.softmax(_weighted_logits(scores, negatives, counts), dim=1)  # [B, C], 0 off the negatives
        a = torch.sigmoid(scores - _positive(scores))  # [B, C]
        b = torch.sigmoid(scores * scores)  # [B, C]
        row = (s * (a + b)).sum(1, keepdim=True)  # [B, 1]
        ctx.save_for_backward(scores, s, a, b, row, rho)
        return (row.squeeze(1) * rho).sum()

    @staticmethod
    def backward(ctx: Any, grad_out: torch.Tensor) -> tuple[torch.Tensor, None]:
        scores, s, a, b, row, rho = ctx.saved_tensors
        ga = _dsigmoid(a).mul_(s)  # [B, C], s_k a_k'
        to_target = ga.sum(1)  # [B]
        grad = _dsigmoid(b).mul_(scores).mul_(2.0).add_(a).add_(b).sub_(row).mul_(s).add_(ga)  # [B, C]
        grad.diagonal().sub_(to_target)
        return grad.mul_((rho * grad_out).unsqueeze(1)), None, None


def bpr(scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None) -> torch.Tensor:
    return _BPR.apply(scores, negatives, counts)


def top1(scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None) -> torch.Tensor:
    return _TOP1.apply(scores, negatives, counts)


def cross_entropy(scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None) -> torch.Tensor:
    return _CrossEntropy.apply(scores, negatives, counts)


def bpr_max(scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None,
            reg: float = 1.0) -> torch.Tensor:
    return _BPRMax.apply(scores, negatives, counts, reg)


def top1_max(scores: torch.Tensor, negatives: torch.Tensor, counts: torch.Tensor | None = None) -> torch.Tensor:
    return _TOP1Max.apply(scores, negatives, counts)


def logq_corrected(scores: torch.Tensor, log_q: torch.Tensor) -> torch.Tensor:
    """scores float [B, C], log_q float [C] -> scores - log_q, column by column (log-Q correction).

    Sampled candidates are not drawn uniformly: a popular item is drawn often, so it appears among
    the negatives far more than its share, and the loss pushes it down far more than a full softmax
    would. Yi et al. (RecSys 2019, "Sampling-bias-corrected neural modeling for large corpus item
    recommendations", eq. 3) correct each candidate's score by its sampling probability p_j,
    s^c(x, y_j) = s(x, y_j) - log(p_j), for every candidate including the positive, before the
    loss. The correction is a constant per column, so the gradient with respect to the scores is
    unchanged: only the point where each loss is evaluated moves.
    """
    return scores - log_q.unsqueeze(0)


def get_loss(name: str, score_penalty: float = 1.0) -> LossFn:
    """The loss named `name` (one of LOSS_NAMES); `score_penalty` is BPR-max's score regularisation lambda."""
    if name == "bpr-max":
        return lambda scores, negatives, counts=None: bpr_max(scores, negatives, counts, reg=score_penalty)
    table: dict[str, LossFn] = {"top1": top1, "bpr": bpr, "cross-entropy": cross_entropy, "top1-max": top1_max}
    if name not in table:
        raise ValueError(f"unknown loss {name!r}; expected one of {', '.join(LOSS_NAMES)}")
    return table[name]
