"""One click event: what a visit clicked and what it was shown, as one JSON object.

Fields (the export and the experiment report read these names; README "The online loop"):
    t            epoch seconds (float) when the click was answered
    session_id   the visit's id, or its pseudonym (HMAC-SHA256 under CAIRN_EVENTS_KEY, 32 hex chars)
    sequence     clicks the visit had applied after this one (0: the click was not recorded)
    item_id      the clicked item
    shown        the items answered, best first: rank r is shown[r - 1]
    served_by    gru | neighbours | popularity
    fallback     the fallback reason, or null
    artifact     name/version of the artifact that answered
    arm          the experiment arm, or null without an experiment
    elapsed_ms   time from the request's start to the answer
    event_id     the request's event id, or null
    duplicate    true when the event id had been applied before (nothing was applied now)

On the click path an event is a tuple; it becomes a dict only in the writer (`as_record`).
"""

from __future__ import annotations

import hashlib
import hmac
from typing import Any

FIELDS = (
    "t", "session_id", "sequence", "item_id", "shown", "served_by", "fallback",
    "artifact", "arm", "elapsed_ms", "event_id", "duplicate",
)  # fmt: skip

PSEUDONYM_HEX = 32  # 128 bits of the HMAC: collisions among billions of visits stay improbable


def as_record(event: tuple[Any, ...]) -> dict[str, Any]:
    return dict(zip(FIELDS, event))


class Pseudonyms:
    """Session ids as the event log keeps them: as they are, or HMAC-SHA256 (RFC 2104) under a key,
    so the log cannot be joined back to the storefront's ids without the key. A visit keeps one
    pseudonym, so per-visit analysis (the experiment report, `cairn prepare`) works unchanged."""

    def __init__(self, key: bytes | None) -> None:
        self._key = key
        self._cache: dict[str, str] = {}

    def __call__(self, session_id: str) -> str:
        if self._key is None:
            return session_id
        cached = self._cache.get(session_id)
        if cached is None:
            if len(self._cache) > 100_000:  # bounded: a visit's clicks are close together in time
                self._cache.clear()
            cached = self._cache[session_id] = hmac.new(self._key, session_id.encode(), hashlib.sha256).hexdigest()[:PSEUDONYM_HEX]
        return cached
