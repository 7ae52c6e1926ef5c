"""bench.service.paced: open-loop clicks evenly spaced over the connections, each timed from when
it was due; and bench.catalogue.capacity_at_budget built on it. Against small HTTP/1.1 servers on
loopback (one that records when each request came, one that answers after a set delay)."""

from __future__ import annotations

import asyncio
import http.server
import re
import statistics
import threading
import time

import pytest

from bench.catalogue import capacity_at_budget
from bench.service import paced


async def recording_server(delay_s: float) -> tuple[asyncio.Server, int, list[float]]:
    arrivals: list[float] = []

    async def handle(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            while True:
                head = await reader.readuntil(b"\r\n\r\n")
                arrivals.append(time.perf_counter())
                length = int(re.search(rb"(?i)content-length: *(\d+)", head).group(1))
                await reader.readexactly(length)
                await asyncio.sleep(delay_s)
                writer.write(b"HTTP/1.1 200 OK\r\nContent-Length: 2\r\n\r\n{}")
                await writer.drain()
        except (asyncio.IncompleteReadError, ConnectionError):
            writer.close()

    server = await asyncio.start_server(handle, "127.0.0.1", 0)
    return server, server.sockets[0].getsockname()[1], arrivals


def click_of(c: int, n: int) -> tuple[str, str]:
    return f"v-{c}", f"sku-{n:06d}"


def test_clicks_are_spread_evenly_not_sent_in_bursts() -> None:
    async def go() -> tuple[dict, list[float]]:
        server, port, arrivals = await recording_server(0.0)
        async with server:
            result = await paced(port, click_of, rate=100.0, connections=4, max_clicks=40, max_seconds=5.0)
        return result, arrivals

    result, arrivals = asyncio.run(go())
    assert result["clicks"] == 40 and result["errors"] == 0
    gaps = [b - a for a, b in zip(arrivals, arrivals[1:])]
    # 100 clicks/s: one every 10 ms. Four connections sending together would leave three of every
    # four gaps near zero (bursts of 4 every 40 ms); spread out, the typical gap is the interval.
    assert 0.007 < statistics.median(gaps) < 0.013, gaps
    assert 0.35 < arrivals[-1] - arrivals[0] < 0.6  # 39 intervals of 10 ms


def paced_against(answer_s: float, **pacing: float) -> dict:
    """`paced` against a recording server that answers after `answer_s` seconds."""

    async def go() -> dict:
        server, port, _ = await recording_server(answer_s)
        async with server:
            return await paced(port, click_of, **pacing)

    return asyncio.run(go())


def test_a_slow_answer_delays_the_clock_of_the_clicks_after_it() -> None:
    # Each connection's clicks are due every 40 ms (4 connections at 100/s) but every answer takes
    # 60 ms: the clicks fall behind their schedule, and timed from when they were due their
    # latency grows instead of staying at 60 ms (no coordinated omission).
    result = paced_against(0.06, rate=100.0, connections=4, max_clicks=24, max_seconds=5.0)
    assert result["clicks"] == 24
    assert result["p50_ms"] > 70 and result["p99_ms"] > 100, result


def test_bounded_by_time() -> None:
    result = paced_against(0.0, rate=50.0, connections=2, max_clicks=10_000, max_seconds=0.3)
    assert 12 <= result["clicks"] <= 16  # 0.3 s at 50/s: 15 clicks due


class _Server(http.server.ThreadingHTTPServer):
    request_queue_size = 64  # the pacer opens its 32 connections at once (the default backlog is 5)


class _Slow(http.server.BaseHTTPRequestHandler):
    protocol_version = "HTTP/1.1"  # keep-alive, as the pacer's connections expect
    disable_nagle_algorithm = True  # headers and body are two writes: no 40 ms wait for an ACK between them
    delay_s = 0.0

    def do_POST(self) -> None:  # noqa: N802 - the standard library's name
        self.rfile.read(int(self.headers["Content-Length"]))
        time.sleep(self.delay_s)
        self.send_response(200)
        self.send_header("Content-Length", "2")
        self.end_headers()
        self.wfile.write(b"{}")

    def log_message(self, *_: object) -> None:
        pass


@pytest.mark.parametrize(("delay_s", "expected"), [(0.0, 200.0), (0.03, 0.0)])
def test_capacity_is_the_highest_rate_within_the_budget(delay_s: float, expected: float) -> None:
    # Answers in no time: every rate up to the ceiling is within 25 ms. Answers in 30 ms: none is,
    # and the two halvings below the first rate do not find one either.
    handler = type("Handler", (_Slow,), {"delay_s": delay_s})
    server = _Server(("127.0.0.1", 0), handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        cap = capacity_at_budget(server.server_address[1], [f"sku-{i:06d}" for i in range(50)], ceiling=200.0, max_clicks=40, max_seconds=1.0)
    finally:
        server.shutdown()
        server.server_close()
    assert cap["clicks_per_s"] == expected
    rates = [step["rate"] for step in cap["steps"]]
    if expected:
        assert rates == [60.0, 100.0, 140.0, 170.0, 200.0]  # CAPACITY_SHARES of the ceiling
    else:
        assert rates == [60.0, 30.0, 15.0]  # the first share, then two halvings toward 0
