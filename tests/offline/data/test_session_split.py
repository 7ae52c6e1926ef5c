"""SessionSplit's subsets and seeded samples (what validation and evaluation run on at scale)."""

from __future__ import annotations

import numpy as np

from offline.data.dataset import SessionSplit

WHOLE = SessionSplit.from_sessions(
    [[1, 2], [3], [4, 5, 6], [7, 8], [9], [10, 11]], times=[[0, 1], [2], [3, 4, 5], [6, 7], [8], [9, 10]]
)


def test_a_subset_is_the_split_of_those_sessions() -> None:
    # Reference: the split built directly from the same sessions (their clicks and times follow them).
    part = WHOLE.subset(np.array([2, 0]))
    expected = SessionSplit.from_sessions([[4, 5, 6], [1, 2]], times=[[3, 4, 5], [0, 1]])
    for field in ("items", "offsets", "times"):
        assert np.array_equal(getattr(part, field), getattr(expected, field)), field
    assert WHOLE.subset(np.array([], dtype=np.int64)).n_sessions == 0


def test_a_sample_is_seeded_and_holds_sessions_with_a_next_click() -> None:
    sample = WHOLE.sample(2, seed=5)
    kept = [s.tolist() for s in sample.sessions()]
    assert len(kept) == 2 and all(len(s) >= 2 for s in kept)
    usable = [s.tolist() for s in WHOLE.sessions() if len(s) >= 2]
    assert all(s in usable for s in kept) and kept == sorted(kept, key=usable.index)  # split order kept
    assert kept == [s.tolist() for s in WHOLE.sample(2, seed=5).sessions()]  # the same sample each time
    assert [s.tolist() for s in WHOLE.sample(0, seed=5).sessions()] == usable  # 0: every usable session
    assert [s.tolist() for s in WHOLE.sample(10, seed=5).sessions()] == usable
    only_usable = WHOLE.subset(np.array([0, 2, 3, 5]))
    assert only_usable.sample(0, seed=1) is only_usable  # nothing to leave out: the split itself
