"""Where events go: JSON Lines files in a folder, or a Redis stream. Both take whole batches.

Folder: one file per worker process, `events-<host>-<pid>-<YYYYMMDDTHH>-<n>.jsonl`, a new one each
UTC hour and whenever the current one passes CAIRN_EVENTS_FILE_MB. A batch is one `write(2)` on a
file opened with O_APPEND, made on the event loop (measured: handing it to a thread cost the clicks
more, bench/events.py); once it returns the kernel holds it, so killing the process loses
nothing written (a power cut can lose what the kernel had not yet put on disk; no fsync per batch).
A batch cut short by a crash leaves at most one partial last line, which readers skip and count.

Redis: XADD to `<prefix>events`, one entry per event (field `e`, the JSON), `MAXLEN ~ N` so Redis
trims whole nodes cheaply (the stream keeps at least N entries; https://redis.io/docs/latest/commands/xadd/).
A batch is one pipeline (MULTI/EXEC), so it is added whole or not at all.
"""

from __future__ import annotations

import asyncio
import os
import socket
import time
from pathlib import Path
from typing import Protocol

from service.config import Settings, redacted
from service.errors import EventSinkError

FILE_PREFIX, FILE_SUFFIX = "events-", ".jsonl"
STREAM_FIELD = b"e"
INLINE_MAX = 256 * 1024  # folder batches up to this size are written on the event loop


def stream_key(prefix: str) -> str:
    return f"{prefix}events"


class EventSink(Protocol):
    kind: str

    async def write(self, lines: list[bytes]) -> None:
        """Write the JSON lines (no newline) whole; EventSinkError when they could not be written."""
        ...

    async def close(self) -> None: ...


def check_folder(folder: Path) -> None:
    """Create the events folder if needed; EventSinkError when it cannot be created or written."""
    try:
        Path(folder).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise EventSinkError(f"CAIRN_EVENTS={str(folder)!r}: cannot create the folder ({exc.strerror})") from None
    if not os.access(folder, os.W_OK):
        raise EventSinkError(f"CAIRN_EVENTS={str(folder)!r}: the folder is not writable")


class FolderSink:
    kind = "folder"

    def __init__(self, folder: Path, max_bytes: int, clock=time.time) -> None:
        self.folder = Path(folder)
        self.max_bytes = max_bytes
        self._clock = clock
        self._stem = f"{FILE_PREFIX}{socket.gethostname().replace('-', '_')}-{os.getpid()}"
        self._fd: int | None = None
        self._hour = ""
        self._size = 0
        self._n = 0
        check_folder(self.folder)

    async def write(self, lines: list[bytes]) -> None:
        payload = b"\n".join(lines) + b"\n"
        if len(payload) <= INLINE_MAX:
            # An append of this size into the page cache takes microseconds; a hop to a thread costs
            # the event loop more (the GIL hand-back after the thread's write can hold it for ms).
            self._write(payload)
        else:
            await asyncio.to_thread(self._write, payload)

    def _write(self, payload: bytes) -> None:
        hour = time.strftime("%Y%m%dT%H", time.gmtime(self._clock()))
        try:
            if self._fd is None or hour != self._hour or self._size >= self.max_bytes:
                self._open(hour)
            view = memoryview(payload)
            while view:
                written = os.write(self._fd, view)  # type: ignore[arg-type]
                view = view[written:]
            self._size += len(payload)
        except OSError as exc:
            self._close_fd()
            raise EventSinkError(f"writing events to {self.folder} failed ({exc.strerror})") from None

    def _open(self, hour: str) -> None:
        self._close_fd()
        if hour != self._hour:
            self._hour, self._n = hour, 0
        while True:  # a restarted worker may get the pid of an earlier one: never append to its file
            self._n += 1
            path = self.folder / f"{self._stem}-{hour}-{self._n:04d}{FILE_SUFFIX}"
            try:
                self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o640)
                break
            except FileExistsError:
                continue
        self._size = 0

    def _close_fd(self) -> None:
        if self._fd is not None:
            try:
                os.close(self._fd)
            finally:
                self._fd = None

    async def close(self) -> None:
        self._close_fd()


class RedisStreamSink:
    kind = "redis"

    def __init__(self, url: str, key: str, max_len: int, timeout_s: float, connect_timeout_s: float) -> None:
        import redis.asyncio as aioredis

        self.url, self.key, self.max_len = url, key, max_len
        self._client = aioredis.from_url(url, socket_timeout=timeout_s, socket_connect_timeout=connect_timeout_s, max_connections=2)

    async def write(self, lines: list[bytes]) -> None:
        from redis.exceptions import RedisError

        try:
            async with self._client.pipeline(transaction=True) as pipe:
                for line in lines:
                    pipe.xadd(self.key, {STREAM_FIELD: line}, maxlen=self.max_len, approximate=True)
                await pipe.execute()
        except (RedisError, OSError) as exc:
            raise EventSinkError(f"writing events to {redacted(self.url)} failed ({type(exc).__name__})") from None

    async def close(self) -> None:
        await self._client.aclose()


def open_sink(settings: Settings) -> EventSink | None:
    """The sink CAIRN_EVENTS names, None when off."""
    kind = settings.events_kind
    if kind == "off":
        return None
    if kind == "redis":
        return RedisStreamSink(
            settings.events, stream_key(settings.redis_prefix), settings.events_stream_max,
            settings.redis_timeout_s * 4, settings.redis_connect_timeout_s,
        )  # fmt: skip
    return FolderSink(Path(settings.events), int(settings.events_file_mb * 1024 * 1024))
