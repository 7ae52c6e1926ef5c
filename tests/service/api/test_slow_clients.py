"""Slow or stuck clients cannot hold the service: a body must arrive within CAIRN_BODY_TIMEOUT_S
(else 408, RFC 9110 section 15.5.9), and past CAIRN_MAX_CONNECTIONS a worker answers 503 at once."""

from __future__ import annotations

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


def test_connections_past_the_cap_get_503_at_once(fresh_server):
    running = fresh_server("memory", body_timeout_s=5.0, max_connections=4)
    stuck = [_connect(running.url) for _ in range(6)]
    try:
        for s in stuck:
            s.sendall(HALF_BODY)
        # The worker takes the stuck connections as its loop gets to them (on a loaded machine more
        # than a few hundred ms): ask on a new connection each time until it is full, 5 s at most.
        deadline = time.monotonic() + 5
        while True:
            with running.client() as c:
                started = time.monotonic()
                r = c.get("/healthz")
                took = time.monotonic() - started
            if r.status_code == 503 or time.monotonic() > deadline:
                break
            time.sleep(0.1)
        assert r.status_code == 503 and took < 2.0, (r.status_code, took)
    finally:
        for s in stuck:
            s.close()
    deadline = time.monotonic() + 5
    with running.client() as c:
        while c.get("/healthz").status_code != 200:  # the stuck connections are gone: served again
            assert time.monotonic() < deadline
            time.sleep(0.05)
