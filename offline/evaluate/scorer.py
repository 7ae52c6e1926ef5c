"""The one protocol every offline recommender implements, so one evaluator measures them all.

The evaluator runs a batch of sessions side by side: `begin(n)` starts n empty sessions, then each
`advance(items)` feeds one click to each of the n sessions and returns the scores of every item as
the next click, float32 [n, n_items]. Higher is better. Slots whose session has already ended are
fed a repeat of their last click; their scores are ignored. A scorer with a `needed` attribute is
told before each `advance` which rows will be read (bool [n]) and may leave the others unscored.
"""

from __future__ import annotations

from typing import Protocol

import numpy as np


class SessionScorer(Protocol):
    name: str
    n_items: int

    def begin(self, n_sessions: int) -> None: ...

    def advance(self, items: np.ndarray) -> np.ndarray: ...
