"""A slow model on purpose, for benchmarks and tests: passed to the app factory as `wrap_model`.

Never used by `cairn serve`; it lives in the package so that the resilience benchmark and the tests
inject the same slowness.
"""

from __future__ import annotations

import asyncio


class DelayedGru:
    """The GRU recommender with every call `delay_s` slower: an overloaded or stuck model."""

    name = "gru"

    def __init__(self, inner, delay_s: float) -> None:
        self.inner, self.delay_s = inner, delay_s

    def start(self):
        return self.inner.start()

    async def advance(self, state, item):
        await asyncio.sleep(self.delay_s)
        return await self.inner.advance(state, item)

    async def step(self, state, item, count, seen=frozenset()):
        await asyncio.sleep(self.delay_s)
        return await self.inner.step(state, item, count, seen)

    async def rank(self, state, count, seen=frozenset()):
        await asyncio.sleep(self.delay_s)
        return await self.inner.rank(state, count, seen)
