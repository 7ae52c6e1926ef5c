"""Progress that shows in a terminal and in a pipe or CI log alike.

On a terminal, tqdm's bar. Elsewhere (stdout/stderr not a terminal), a bar would write one unreadable
line of carriage returns, so a plain line is printed every `every_s` seconds instead:

    epoch 1: 38% (187,392 of 493,056 clicks), 21,305 clicks/s, loss 1.2741
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import Any

from tqdm import tqdm


class LineProgress:
    """tqdm's `update` / `set_postfix` / context manager, printing a line now and then."""

    def __init__(self, total: int, desc: str, every_s: float = 30.0, write: Callable[[str], None] | None = None) -> None:
        self.total, self.desc, self.every_s = total, desc, every_s
        self.n = 0
        self.postfix = ""
        self._write = write or (lambda line: print(line, file=sys.stderr, flush=True))
        self._started = self._last = time.perf_counter()

    def __enter__(self) -> LineProgress:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def update(self, n: int) -> None:
        self.n += n
        now = time.perf_counter()
        if now - self._last >= self.every_s:
            self._last = now
            rate = self.n / max(now - self._started, 1e-9)
            share = f"{100 * self.n / self.total:.0f}% " if self.total else ""
            tail = f", {self.postfix}" if self.postfix else ""
            self._write(f"{self.desc}: {share}({self.n:,} of {self.total:,} clicks), {rate:,.0f} clicks/s{tail}")

    def set_postfix(self, refresh: bool = False, **values: Any) -> None:
        self.postfix = ", ".join(f"{k} {v}" for k, v in values.items())


def epoch_progress(total: int, desc: str, show: bool | None, every_s: float = 30.0) -> tqdm | LineProgress:
    """A bar on a terminal (or when `show` is True); plain lines otherwise (`show` False: none at all)."""
    if show is False:
        return LineProgress(total, desc, every_s=float("inf"))
    if show or sys.stderr.isatty():
        return tqdm(total=total, desc=desc, unit="click", unit_scale=True, leave=False)
    return LineProgress(total, desc, every_s=every_s)
