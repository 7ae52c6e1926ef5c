"""Session-store wrappers tests inject (small classes, not patches)."""

from __future__ import annotations


class CountingStore:
    """Wraps a store and counts its reads and the check-and-set writes that lost a race."""

    def __init__(self, inner) -> None:
        self.inner = inner
        self.kind = inner.kind
        self.reads = 0
        self.lost = 0

    async def load(self, session_id):
        self.reads += 1
        return await self.inner.load(session_id)

    async def save(self, session_id, value, expected_token):
        done = await self.inner.save(session_id, value, expected_token)
        self.lost += not done
        return done

    def __getattr__(self, name):
        return getattr(self.inner, name)
