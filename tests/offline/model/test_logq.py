"""Log-Q correction of sampled candidates against the published formula, worked by hand.

Source: Yi et al., "Sampling-bias-corrected neural modeling for large corpus item
recommendations", RecSys 2019, eq. (3): s^c(x, y_j) = s(x, y_j) - log(p_j), and eq. (4): the
batch softmax -log( e^{s^c(x_i, y_i)} / sum_j e^{s^c(x_i, y_j)} ) over the corrected scores.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import torch

from offline.model.gru import load_checkpoint
from offline.model.losses import get_loss, logq_corrected, negative_mask
from offline.model.session_batches import candidate_log_q
from tests.offline.model.test_train import data_dir, train  # noqa: F401 - the module's fixture, reused

# One session slot (target item 4) and two sampled items 1 and 2; p_j is each candidate's
# sampling probability, chosen by hand.
SCORES = [[2.0, 1.0, 0.5]]
P = [0.5, 0.25, 0.125]


def test_corrected_cross_entropy_equals_the_published_formula_by_hand() -> None:
    # Eq. (3) by hand: 2 - ln 0.5 = 2.693147, 1 - ln 0.25 = 2.386294, 0.5 - ln 0.125 = 2.579442.
    corrected = [2.693147, 2.386294, 2.579442]
    expected = -math.log(math.exp(corrected[0]) / sum(math.exp(c) for c in corrected))  # eq. (4): e^2.693147 = 14.7781, e^2.386294 = 10.8731, e^2.579442 = 13.1897; -ln(14.7781 / 38.8409) = 0.966330
    assert abs(expected - 0.966330) < 1e-5
    scores = torch.tensor(SCORES, dtype=torch.float64, requires_grad=True)
    log_q = torch.log(torch.tensor(P, dtype=torch.float64))
    loss = get_loss("cross-entropy")(logq_corrected(scores, log_q), negative_mask(torch.tensor([4]), torch.tensor([4, 1, 2])))
    assert abs(loss.item() - expected) < 1e-5
    # Without the correction the popular target (p = 0.5) looks easier: a smaller loss.
    plain = get_loss("cross-entropy")(scores, negative_mask(torch.tensor([4]), torch.tensor([4, 1, 2])))
    assert plain.item() < loss.item() - 0.3
    # The correction is a constant per column: the gradient is the softmax's, p - onehot, at the corrected point.
    loss.backward()
    e = [math.exp(c) for c in corrected]
    want = [e[0] / sum(e) - 1.0, e[1] / sum(e), e[2] / sum(e)]
    assert np.allclose(scores.grad.numpy()[0], want, atol=1e-5)


def test_corrected_bpr_compares_corrected_differences() -> None:
    # BPR over corrected scores: mean_j -log sigmoid((r_p - log p_p) - (r_j - log p_j)).
    scores = torch.tensor(SCORES, dtype=torch.float64)
    log_q = torch.log(torch.tensor(P, dtype=torch.float64))
    loss = get_loss("bpr")(logq_corrected(scores, log_q), negative_mask(torch.tensor([4]), torch.tensor([4, 1, 2])))
    c = [s - math.log(p) for s, p in zip(SCORES[0], P)]
    expected = sum(-math.log(1.0 / (1.0 + math.exp(-(c[0] - c[j])))) for j in (1, 2)) / 2
    assert abs(loss.item() - expected) < 1e-9


def test_candidate_probability_counts_both_draws() -> None:
    counts = np.array([6.0, 3.0, 1.0, 0.0])  # training clicks; item 3 never clicked
    weights = counts**0.5
    got = candidate_log_q(counts, weights, batch_size=4, n_negatives=10).numpy()
    w = weights / weights.sum()
    want = np.log((4 * counts / counts.sum() + 10 * w)[:3])  # expected copies among the B + M candidates
    assert np.allclose(got[:3], want, atol=1e-6)
    assert got[3] < -60  # never a candidate: a floor, not -inf or NaN
    # In-batch only (M = 0): the targets' own frequency.
    assert np.allclose(candidate_log_q(counts, weights, 4, 0).numpy()[:3], np.log(4 * counts[:3] / 10), atol=1e-6)


def test_training_with_the_correction_learns_and_is_recorded(data_dir: Path, tmp_path: Path) -> None:  # noqa: F811
    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0", "--loss", "bpr-max", "--logq-correction") == 0
    _, extra = load_checkpoint(tmp_path / "best.pt")
    assert extra["hyperparameters"]["logq_correction"] is True
    assert extra["valid"]["mrr@20"] > 0.9  # the paths are deterministic (see test_train.py)
    assert train(data_dir, tmp_path / "plain", "--epochs", "1") == 0
    assert load_checkpoint(tmp_path / "plain" / "best.pt")[1]["hyperparameters"]["logq_correction"] is False
