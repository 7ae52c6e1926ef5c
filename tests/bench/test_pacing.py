"""bench.service.paced: open-loop clicks evenly spaced over the connections, each timed from when
it was due. Against a small HTTP/1.1 server on loopback that records when each request came."""

from __future__ import annotations

import asyncio
import re
import statistics
import time

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


def test_a_slow_answer_delays_the_clock_of_the_clicks_after_it() -> None:
    # Each connection's clicks are due every 40 ms (4 connections at 100/s) but every answer takes
    # 60 ms: the clicks fall behind their schedule, and timed from when they were due their
    # latency grows instead of staying at 60 ms (no coordinated omission).
    async def go() -> dict:
        server, port, _ = await recording_server(0.06)
        async with server:
            return await paced(port, click_of, rate=100.0, connections=4, max_clicks=24, max_seconds=5.0)

    result = asyncio.run(go())
    assert result["clicks"] == 24
    assert result["p50_ms"] > 70 and result["p99_ms"] > 100, result


def test_bounded_by_time() -> None:
    async def go() -> dict:
        server, port, _ = await recording_server(0.0)
        async with server:
            return await paced(port, click_of, rate=50.0, connections=2, max_clicks=10_000, max_seconds=0.3)

    result = asyncio.run(go())
    assert 12 <= result["clicks"] <= 16  # 0.3 s at 50/s: 15 clicks due
