"""Session-parallel mini-batches and the negatives drawn beside them (Hidasi et al., ICLR 2016).

B slots run side by side, each holding one session; a step feeds every slot one click (input =
click t of its session, target = click t+1). When a slot's session has no target left, the next
session in split order (sessions are ordered by start time) takes the slot and the slot's hidden
state is reset to zero, which the step's reset mask says.

Tail: the epoch ends at the first step after which a slot has finished its session and no
session is left to take it (as in the 2016 paper's code). The clicks still waiting in the other
slots' sessions at that moment, at most B - 1 of the latest sessions, are not trained on in that
epoch; the batch never shrinks, so every step has exactly B rows. Sessions of one click have no
target and are skipped.

The extra negatives of the sampled output are drawn by popularity**alpha, many steps at a time,
so sampling is one vectorised call every few hundred steps instead of one per step; or, for a
small catalogue, every item is a negative of every step (`EveryItem`).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import NamedTuple

import numpy as np
import torch

from offline.data.dataset import SessionSplit

# Negatives drawn per refill of the sample buffer (common practice: keep the buffer a few MB).
SAMPLE_BUFFER = 1 << 20


class Step(NamedTuple):
    inputs: np.ndarray  # int64 [B], the click each slot is fed
    targets: np.ndarray  # int64 [B], the click that follows it
    reset: np.ndarray  # bool [B], True where a new session starts in this step: zero that slot's hidden state


class SessionParallelBatches:
    """An iterable over the steps of one epoch; iterate again for the next epoch (same order)."""

    def __init__(self, split: SessionSplit, batch_size: int) -> None:
        if batch_size < 1:
            raise ValueError(f"batch_size must be positive, got {batch_size}")
        lengths = split.lengths()
        self.sessions = np.flatnonzero(lengths >= 2).astype(np.int64)  # sessions with a target, in split order
        if len(self.sessions) < batch_size:
            raise ValueError(
                f"batch size {batch_size} is larger than the {len(self.sessions)} sessions of two or more clicks"
            )
        self.batch_size = batch_size
        self._items = split.items.astype(np.int64)  # converted once: embeddings take int64
        self._starts = split.offsets[self.sessions]  # [S]
        self._ends = split.offsets[self.sessions + 1]  # [S], exclusive

    @property
    def n_events(self) -> int:
        """Input/target pairs in the split (an upper bound of what one epoch trains on, see Tail)."""
        return int((self._ends - self._starts - 1).sum())

    def __iter__(self) -> Iterator[Step]:
        b = self.batch_size
        pos = self._starts[:b].copy()  # [B] index of each slot's current input click
        end = self._ends[:b].copy()  # [B] one past each slot's last click
        next_session = b
        n_sessions = len(self.sessions)
        no_reset = np.zeros(b, dtype=bool)
        no_reset.flags.writeable = False  # shared by every step without a new session
        reset = np.ones(b, dtype=bool)
        while True:
            yield Step(self._items[pos], self._items[pos + 1], reset)
            pos += 1
            done = np.flatnonzero(pos + 1 >= end)  # slots whose session has no target left
            if len(done) == 0:
                reset = no_reset
                continue
            if next_session + len(done) > n_sessions:
                return
            new = slice(next_session, next_session + len(done))
            pos[done] = self._starts[new]
            end[done] = self._ends[new]
            next_session += len(done)
            reset = np.zeros(b, dtype=bool)
            reset[done] = True


def sampling_weights(counts: np.ndarray, alpha: float) -> np.ndarray:
    """Unnormalised draw weights counts**alpha: alpha 0 is uniform over all items, 1 is popularity."""
    if alpha < 0:
        raise ValueError(f"sample alpha must be >= 0, got {alpha}")
    if alpha == 0:
        return np.ones(len(counts), dtype=np.float64)
    return np.asarray(counts, dtype=np.float64) ** alpha


def candidate_log_q(counts: np.ndarray, weights: np.ndarray, batch_size: int, n_negatives: int) -> torch.Tensor:
    """float32 [n_items]: log of how often each item appears among one step's B + M candidates.

    The log-Q correction (losses.logq_corrected) needs p_j, the probability that item j is among a
    batch's candidates (Yi et al., RecSys 2019, section 4: "the probability of item j in a batch").
    A step's candidates come from two draws: its B targets, which follow the training clicks
    (counts / total), and M negatives drawn by `weights`. The expected number of copies of j is
    B c_j / sum(c) + M w_j / sum(w); every column holding item j gets the same correction, as in
    the paper, whichever of the two draws put it there. Items that can never be a candidate get a
    floor instead of log 0 (they never reach the loss).
    """
    counts = np.asarray(counts, dtype=np.float64)
    weights = np.asarray(weights, dtype=np.float64)
    expected = batch_size * counts / max(counts.sum(), 1.0)
    if n_negatives > 0 and weights.sum() > 0:
        expected = expected + n_negatives * weights / weights.sum()
    return torch.from_numpy(np.log(np.maximum(expected, 1e-30)).astype(np.float32))


class NegativeSampler:
    """Draws `n_negatives` item indices per step, shared by all rows of the step, in bulk."""

    in_batch = True  # the step's other targets are negatives too

    def __init__(self, weights: np.ndarray, n_negatives: int, seed: int, buffer_size: int = SAMPLE_BUFFER) -> None:
        if n_negatives < 0:
            raise ValueError(f"n_negatives must be >= 0, got {n_negatives}")
        total = float(np.sum(weights))
        if n_negatives > 0 and not total > 0:
            raise ValueError("no item has a positive sampling weight")
        self.n_negatives = n_negatives
        self._cdf = np.cumsum(weights, dtype=np.float64) / total if total > 0 else np.zeros(0)
        self._cdf[-1:] = 1.0  # rounding must not leave the last bucket short
        self._rng = np.random.default_rng(seed)
        self._rows = max(1, buffer_size // max(n_negatives, 1))  # steps per refill
        self._buffer = torch.empty(0, n_negatives, dtype=torch.int64)  # [rows, M]
        self._next = 0
        self._none = torch.empty(0, dtype=torch.int64)

    def _refill(self) -> None:
        u = self._rng.random(self._rows * self.n_negatives)
        drawn = np.searchsorted(self._cdf, u, side="right").astype(np.int64)  # [rows * M]
        self._buffer = torch.from_numpy(drawn).view(self._rows, self.n_negatives)  # [rows, M]
        self._next = 0

    def draw(self) -> torch.Tensor:
        """int64 [M] negatives for one step (a view into the buffer: read it before the next draw)."""
        if self.n_negatives == 0:
            return self._none
        if self._next >= len(self._buffer):
            self._refill()
        row = self._buffer[self._next]
        self._next += 1
        return row


class EveryItem:
    """Every item as the extra negatives of every step: the loss over the whole catalogue, unsampled.

    Sampling by popularity**alpha without correcting for it biases the sampled softmax-type losses
    against popular items (a popular item is drawn many times, so it weighs that much more among a
    row's negatives). Over every item, once each, there is no sampling to correct for; the in-batch
    targets are then left out as negatives (`in_batch` False), else they would count twice. A step
    scores B + n_items candidates, so this suits catalogues of a few thousand items, not millions.
    """

    in_batch = False

    def __init__(self, n_items: int) -> None:
        if n_items < 1:
            raise ValueError(f"n_items must be positive, got {n_items}")
        self.n_negatives = n_items
        self._all = torch.arange(n_items, dtype=torch.int64)  # [n_items], the same every step

    def draw(self) -> torch.Tensor:
        """int64 [n_items]: every item index."""
        return self._all
