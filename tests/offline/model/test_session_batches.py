"""Session-parallel mini-batches (Hidasi et al., ICLR 2016, section 3.1.1) and bulk negative sampling."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.stats import chisquare

from offline.model.session_batches import EveryItem, NegativeSampler, SessionParallelBatches, sampling_weights
from offline.data.dataset import SessionSplit

# Six sessions in start-time order; the third has one click, so no target, and is skipped.
SESSIONS = [[10, 11, 12], [20, 21], [30], [40, 41, 42, 43], [50, 51], [60, 61, 62]]


def per_slot(steps: list) -> list[list[tuple[int, int, bool]]]:
    b = len(steps[0].inputs)
    return [[(int(s.inputs[k]), int(s.targets[k]), bool(s.reset[k])) for s in steps] for k in range(b)]


def test_two_slots_follow_the_published_scheme_step_by_step() -> None:
    # Worked by hand from the 2016 paper's figure: a slot whose session ends takes the next
    # session in order and is reset; the epoch ends when a slot finds no session left.
    steps = list(SessionParallelBatches(SessionSplit.from_sessions(SESSIONS), batch_size=2))
    slot0, slot1 = per_slot(steps)
    assert slot0 == [(10, 11, True), (11, 12, False), (50, 51, True), (60, 61, True)]
    assert slot1 == [(20, 21, True), (40, 41, True), (41, 42, False), (42, 43, False)]
    # Tail: slot 1 ends after step 3 with no session left, so 61 -> 62 of the last session is not trained.


def test_step_arrays_have_fixed_batch_shape_and_types() -> None:
    batches = SessionParallelBatches(SessionSplit.from_sessions(SESSIONS), batch_size=2)
    for step in batches:
        assert step.inputs.shape == step.targets.shape == step.reset.shape == (2,)
        assert step.inputs.dtype == np.int64 and step.targets.dtype == np.int64 and step.reset.dtype == np.bool_
    assert batches.n_events == 9  # 2 + 1 + 0 + 3 + 1 + 2 input/target pairs


def test_iterating_again_gives_the_same_epoch() -> None:
    batches = SessionParallelBatches(SessionSplit.from_sessions(SESSIONS), batch_size=2)
    assert per_slot(list(batches)) == per_slot(list(batches))


def test_one_slot_walks_every_session_in_order() -> None:
    # With B = 1 the schedule is plain sequential reading: every pair of consecutive clicks once.
    steps = list(SessionParallelBatches(SessionSplit.from_sessions(SESSIONS), batch_size=1))
    expected = [(s[t], s[t + 1], t == 0) for s in SESSIONS for t in range(len(s) - 1)]
    assert per_slot(steps)[0] == expected


def test_batch_larger_than_the_sessions_is_refused() -> None:
    with pytest.raises(ValueError, match="batch size 6 is larger than the 5 sessions"):
        SessionParallelBatches(SessionSplit.from_sessions(SESSIONS), batch_size=6)


def test_popularity_sampling_matches_the_counts() -> None:
    # alpha = 1 draws item i with probability counts_i / sum(counts); Pearson's chi-square test
    # (SciPy) of the drawn frequencies against that distribution. Fixed seed: deterministic.
    counts = np.array([50, 30, 10, 5, 5, 0], dtype=np.int64)
    sampler = NegativeSampler(sampling_weights(counts, 1.0), n_negatives=100, seed=3, buffer_size=1000)
    drawn = torch.cat([sampler.draw() for _ in range(200)]).numpy()  # 20,000 draws over 20 refills
    freq = np.bincount(drawn, minlength=len(counts))
    assert freq[5] == 0  # never an item with no clicks
    expected = counts[:5] / counts.sum() * len(drawn)
    assert chisquare(freq[:5], expected).pvalue > 1e-3


def test_alpha_zero_is_uniform_over_all_items() -> None:
    counts = np.array([1000, 1, 0, 0], dtype=np.int64)
    sampler = NegativeSampler(sampling_weights(counts, 0.0), n_negatives=1000, seed=5)
    freq = np.bincount(torch.cat([sampler.draw() for _ in range(8)]).numpy(), minlength=4)
    assert chisquare(freq, np.full(4, 2000.0)).pvalue > 1e-3


def test_sampling_is_reproducible_per_seed_and_sized_per_step() -> None:
    w = sampling_weights(np.arange(1, 101), 0.75)
    a = NegativeSampler(w, n_negatives=7, seed=1, buffer_size=20)  # refills every 2 steps
    b = NegativeSampler(w, n_negatives=7, seed=1, buffer_size=20)
    c = NegativeSampler(w, n_negatives=7, seed=2, buffer_size=20)
    xs = [a.draw().clone() for _ in range(5)]
    assert all(x.shape == (7,) and x.dtype == torch.int64 for x in xs)
    assert all(torch.equal(x, b.draw()) for x in xs)
    assert not all(torch.equal(x, c.draw()) for x in xs)


def test_no_extra_negatives_gives_an_empty_draw() -> None:
    sampler = NegativeSampler(np.ones(5), n_negatives=0, seed=0)
    assert sampler.draw().shape == (0,)


def test_every_item_draws_the_whole_catalogue_once_and_drops_in_batch_negatives() -> None:
    every = EveryItem(6)
    assert every.n_negatives == 6 and not every.in_batch
    assert every.draw().tolist() == [0, 1, 2, 3, 4, 5] and every.draw().dtype == torch.int64
    assert NegativeSampler(np.ones(5), n_negatives=2, seed=0).in_batch
    with pytest.raises(ValueError, match="n_items must be positive, got 0"):
        EveryItem(0)
