"""A visit expires after the inactivity timeout, over real HTTP, against both stores."""

from __future__ import annotations

import time

import pytest


@pytest.mark.parametrize("store", ["memory", "redis"])
def test_state_expires_after_the_ttl(fresh_server, store, sid):
    running = fresh_server(store, session_ttl_s=0.5)
    session = sid()
    with running.client() as c:
        clicked_at = time.monotonic()
        assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000001"}).json()["sequence"] == 1
        alive = c.get(f"/v1/sessions/{session}/recommendations").json()
        if time.monotonic() - clicked_at < 0.45:  # the check is meaningful only while the TTL has not run out
            assert alive["sequence"] == 1 and alive["served_by"] == "gru"
        time.sleep(0.7)
        gone = c.get(f"/v1/sessions/{session}/recommendations").json()
        assert gone["sequence"] == 0 and gone["served_by"] == "popularity" and gone["fallback_reason"] == "no_history"
        assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000002"}).json()["sequence"] == 1
