"""The click event log against a real folder and a real redis-server: every answered click becomes
one event with what was shown; a full buffer drops and counts, never slowing a click; shutdown
flushes; keyed pseudonyms are HMAC-SHA256."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import redis

from offline.online.event_source import read_events
from service.errors import EventSinkError
from service.events.event import FIELDS, Pseudonyms
from service.events.log import EventLog
from service.events.sinks import FolderSink, RedisStreamSink, stream_key


def _clicks(server, sid, n_visits: int = 5, clicks: int = 4) -> list[dict]:
    answers = []
    with server.client() as c:
        for v in range(n_visits):
            session = sid("ev")
            for k in range(clicks):
                r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": str(10 * v + k), "count": 5, "event_id": f"e{k}"})
                assert r.status_code == 200
                answers.append(r.json())
            r = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "1", "event_id": "e0"})  # a replay
            assert r.json()["duplicate"] is True
            answers.append(r.json())
    return answers


def test_folder_sink_holds_every_answered_click_after_shutdown(serve, settings_for, sid, tmp_path: Path) -> None:
    folder = tmp_path / "events"
    with serve(settings_for(events=str(folder), events_flush_s=30.0)) as server:  # no flush while serving: shutdown must write them
        answers = _clicks(server, sid)
    batch = read_events(str(folder))
    assert batch.skipped == 0 and len(batch.files) == 1
    assert len(batch.events) == len(answers)
    by_key = {(e["session_id"], e["event_id"], e["duplicate"]): e for e in batch.events}
    for a in answers:
        e = by_key[(a["session_id"], "e0" if a["duplicate"] else f"e{a['sequence'] - 1}", a["duplicate"])]
        assert set(e) == set(FIELDS)
        assert e["shown"] == [i["item_id"] for i in a["items"]]
        assert (e["served_by"], e["artifact"], e["sequence"], e["arm"]) == (a["served_by"], a["artifact"], a["sequence"], None)
        assert 0 < e["elapsed_ms"] <= a["elapsed_ms"] + 50


def test_redis_stream_sink_against_a_real_server(serve, settings_for, sid, redis_url: str, tmp_path: Path) -> None:
    settings = settings_for(events=redis_url, events_flush_s=0.05)
    with serve(settings) as server:
        answers = _clicks(server, sid, n_visits=3)
    batch = read_events(redis_url, settings.redis_prefix)
    assert len(batch.events) == len(answers)
    assert sorted(e["item_id"] for e in batch.events) == sorted(
        [str(10 * v + k) for v in range(3) for k in range(4)] + ["1"] * 3
    )
    # The export reads the stream too: the replays (duplicate) are left out of the click log.
    import polars as pl

    from service.cli import main as cairn

    out = tmp_path / "clicks.parquet"
    assert cairn(["events", "export", "--from", redis_url, "--redis-prefix", settings.redis_prefix, "--out", str(out)]) == 0
    log = pl.read_parquet(out)
    assert log.height == len(answers) - 3 and set(log["item_id"]) == {str(10 * v + k) for v in range(3) for k in range(4)}


def test_stream_is_trimmed_approximately(redis_url: str, sid) -> None:
    # XADD MAXLEN ~ N keeps at least N entries and trims whole macro nodes (https://redis.io/docs/latest/commands/xadd/).
    key = stream_key(sid("trim") + ":")

    async def main() -> None:
        sink = RedisStreamSink(redis_url, key, max_len=1000, timeout_s=2, connect_timeout_s=2)
        for start in range(0, 5000, 500):
            await sink.write([json.dumps({"n": n}).encode() for n in range(start, start + 500)])
        await sink.close()

    asyncio.run(main())
    length = redis.Redis.from_url(redis_url).xlen(key)
    assert 1000 <= length < 5000


class _StuckSink:
    kind = "stuck"

    def __init__(self) -> None:
        self.release = asyncio.Event()
        self.lines: list[bytes] = []

    async def write(self, lines: list[bytes]) -> None:
        await self.release.wait()
        self.lines.extend(lines)

    async def close(self) -> None:
        pass


class _BrokenSink(_StuckSink):
    def __init__(self) -> None:
        super().__init__()
        self.fail = True

    async def write(self, lines: list[bytes]) -> None:
        if self.fail:
            raise EventSinkError("sink down")
        self.lines.extend(lines)


def _event(n: int) -> tuple:
    return (float(n), f"s{n}", 1, str(n), ["a"], "gru", None, "x/1", None, 1.0, None, False)


def test_a_full_buffer_drops_and_counts_without_waiting() -> None:
    async def main() -> None:
        sink = _StuckSink()
        log = EventLog(sink, capacity=10, flush_s=0.01)
        log.start()
        for n in range(10):
            log.record(_event(n))
        await asyncio.sleep(0.05)  # the writer took them and is stuck in the sink: they still count against the bound
        for n in range(10, 25):
            log.record(_event(n))  # returns at once: no await on the click path
        assert log.dropped == 15 and log.buffered == 10
        sink.release.set()
        await log.close()
        assert log.written == 10 and [json.loads(x)["item_id"] for x in sink.lines] == [str(n) for n in range(10)]

    asyncio.run(main())


def test_a_refused_batch_is_kept_and_written_when_the_sink_recovers() -> None:
    async def main() -> None:
        sink = _BrokenSink()
        log = EventLog(sink, capacity=100, flush_s=0.01)
        log.start()
        for n in range(5):
            log.record(_event(n))
        await asyncio.sleep(0.05)
        assert log.written == 0 and log.buffered == 5
        sink.fail = False
        log.record(_event(5))
        await log.close()
        assert [json.loads(x)["item_id"] for x in sink.lines] == [str(n) for n in range(6)]

    asyncio.run(main())


def test_folder_sink_rotates_by_size_and_hour(tmp_path: Path) -> None:
    clock = [1_800_000_000.0]  # 2027-01-15T08:00Z
    sink = FolderSink(tmp_path, max_bytes=100, clock=lambda: clock[0])

    async def main() -> None:
        await sink.write([b'{"n":1}'] * 20)  # 160 bytes: past the bound after this batch
        await sink.write([b'{"n":2}'])  # a new file (size)
        clock[0] += 3600
        await sink.write([b'{"n":3}'])  # a new file (hour)
        await sink.close()

    asyncio.run(main())
    names = sorted(p.name for p in tmp_path.iterdir())
    assert len(names) == 3
    assert sum(1 for n in names if "-20270115T08-" in n) == 2 and sum(1 for n in names if "-20270115T09-" in n) == 1


def test_pseudonyms_are_hmac_sha256() -> None:
    # RFC 4231, test case 2: HMAC-SHA256 with key "Jefe" of "what do ya want for nothing?".
    expected = "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert Pseudonyms(b"Jefe")("what do ya want for nothing?") == expected[:32]
    assert Pseudonyms(None)("visit-1") == "visit-1"


def test_keyed_events_hold_no_raw_session_id(serve, settings_for, sid, tmp_path: Path) -> None:
    folder = tmp_path / "events"
    key = "a-long-random-events-key-0123456789"
    with serve(settings_for(events=str(folder), events_key=key)) as server:
        session = sid("secret")
        with server.client() as c:
            for item in ("1", "2"):
                assert c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item}).status_code == 200
    raw = b"".join(p.read_bytes() for p in folder.iterdir())
    assert session.encode() not in raw
    events = read_events(str(folder)).events
    assert {e["session_id"] for e in events} == {Pseudonyms(key.encode())(session)}
