"""Slow or stuck clients cannot hold the service: a body must arrive within CAIRN_BODY_TIMEOUT_S
(else 408, RFC 9110 section 15.5.9), and past CAIRN_MAX_CONNECTIONS a worker answers 503 at once."""

from __future__ import annotations

import select
import socket
import time

HALF_BODY = (
    b"POST /v1/sessions/slow-1/clicks HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
    b"Content-Length: 40\r\n\r\n" + b'{"item_id": "sku'
)


def _connect(url: str) -> socket.socket:
    host, port = url.removeprefix("http://").split(":")
    return socket.create_connection((host, int(port)), timeout=10)


def test_half_a_body_is_answered_408_within_the_body_timeout(fresh_server):
    running = fresh_server("memory", body_timeout_s=0.3)
    with _connect(running.url) as s:
        s.sendall(HALF_BODY)
        started = time.monotonic()
        reply = s.recv(65536)
        waited = time.monotonic() - started
    assert reply.startswith(b"HTTP/1.1 408"), reply[:200]
    assert b'"field": "body"' in reply and b"body_timeout" in reply
    assert 0.25 <= waited < 3.0  # the timeout, with room for a loaded machine; far below a held connection


def _answered(s: socket.socket) -> bool:
    """The worker has written to (or closed) this connection."""
    return bool(select.select([s], [], [], 0)[0])


def test_connections_past_the_cap_get_503_at_once(fresh_server):
    cap = 4
    running = fresh_server("memory", body_timeout_s=5.0, max_connections=cap)
    # Stuck connections one at a time, a fresh request after each: it is served while the stuck ones
    # and itself stay under the cap (uvicorn counts every open connection, its own too), and answered
    # 503 at once when they reach it. A stuck connection whose request the worker read only after a
    # later connection arrived is itself refused (503) and closed; it no longer counts, so another
    # takes its place.
    stuck: list[socket.socket] = []
    deadline = time.monotonic() + 10
    try:
        while True:
            s = _connect(running.url)
            s.sendall(HALF_BODY)
            stuck.append(s)
            time.sleep(0.1)
            with running.client() as c:
                started = time.monotonic()
                r = c.get("/healthz")
                took = time.monotonic() - started
            if r.status_code == 503:
                break
            assert r.status_code == 200 and len(stuck) < cap, (r.status_code, len(stuck))
            for s in [s for s in stuck if _answered(s)]:
                stuck.remove(s)
                s.close()
            assert time.monotonic() < deadline
        assert took < 2.0 and len(stuck) >= 1, (took, len(stuck))
    finally:
        for s in stuck:
            s.close()
    deadline = time.monotonic() + 5
    with running.client() as c:
        while c.get("/healthz").status_code != 200:  # the stuck connections are gone: served again
            assert time.monotonic() < deadline
            time.sleep(0.05)
