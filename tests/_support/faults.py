"""A model made slow or failing at will, passed to the app factory as `wrap_model=fault.wrap`
(a small class injected, not a patch)."""

from __future__ import annotations

import asyncio

from service.errors import StepError


class ModelFault:
    """Passed to the app factory as `wrap_model=fault.wrap`; the test turns slowness or failure on and off."""

    def __init__(self, delay_s: float = 0.0) -> None:
        self.delay_s = delay_s
        self.failing = False

    def wrap(self, inner):
        return FaultyGru(inner, self)


class FaultyGru:
    """The GRU recommender, each call first delayed by `fault.delay_s` and failing while `fault.failing`."""

    name = "gru"

    def __init__(self, inner, fault: ModelFault) -> None:
        self.inner, self.fault = inner, fault

    async def _fault(self) -> None:
        if self.fault.delay_s:
            await asyncio.sleep(self.fault.delay_s)
        if self.fault.failing:
            raise StepError("injected model failure")

    def start(self):
        return self.inner.start()

    async def advance(self, state, item):
        await self._fault()
        return await self.inner.advance(state, item)

    async def step(self, state, item, count, seen=frozenset()):
        await self._fault()
        return await self.inner.step(state, item, count, seen)

    async def rank(self, state, count, seen=frozenset()):
        await self._fault()
        return await self.inner.rank(state, count, seen)
