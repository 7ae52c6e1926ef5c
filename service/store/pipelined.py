"""One Redis connection that every click of a worker shares, its commands pipelined.

The click path sends one or two commands to Redis (a GET when the state is not in this worker's
recent writes, then the check-and-set). Through redis-py's pooled client each costs a pool
checkout and return, the retry and observability wrappers and a write and a read system call of
its own, which the benchmark showed as the gap between the Redis store and the in-memory one
(bench/service.py, README). Here the commands of all concurrent clicks go over one connection:
those issued in one turn of the event loop leave in one write, and one reader task matches the
replies to the waiting callers in order (Redis answers the commands of one connection in the
order it received them). Redis runs commands one at a time anyway, so one connection costs it no
parallelism.

The connection is opened and authenticated by redis-py (`make_connection`: the URL's password,
user, database and TLS options all apply); this module only takes over its stream. Rules kept
from the pooled client:
- no retries: a command whose reply was lost reports an error, never a second attempt;
- a reply later than `timeout_s` after its command was sent fails the connection and every
  command waiting on it (TimeoutError), as the pool's socket timeout does; the next command
  connects afresh, so a restarted Redis is reached again at once;
- a caller that gives up (the request's deadline cancels it) leaves the connection intact: its
  reply is read and dropped when it comes, unlike a pooled connection that must be thrown away.
Errors are redis-py's exceptions (ConnectionError, TimeoutError, ResponseError and its
subclasses such as NoScriptError), so the store translates them as before.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections import deque
from collections.abc import Callable
from typing import Any

import hiredis
from redis._parsers.base import BaseParser
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import ResponseError
from redis.exceptions import TimeoutError as RedisTimeoutError

READ_SIZE = 65536


class _ErrorReply(Exception):
    """An error reply as hiredis hands it over; turned into redis-py's class for it by `call`."""


def bulk(*parts: bytes) -> bytes:
    """Bulk strings in RESP (the Redis protocol): the parts of a command after its array header."""
    return b"".join(b"$%d\r\n%s\r\n" % (len(p), p) for p in parts)


def pack(*parts: bytes) -> bytes:
    """A whole command in RESP: an array of bulk strings."""
    return b"*%d\r\n" % len(parts) + bulk(*parts)


class PipelinedConnection:
    def __init__(self, make_connection: Callable[[], Any], timeout_s: float) -> None:
        self._make_connection = make_connection  # a redis-py asyncio Connection, not yet connected
        self.timeout_s = timeout_s
        self._connection: Any = None  # the redis-py Connection whose stream we use
        self._writer: asyncio.StreamWriter | None = None
        self._reader_task: asyncio.Task | None = None
        self._connecting: asyncio.Future | None = None
        self._waiting: deque[tuple[asyncio.Future, float]] = deque()  # (reply, sent at): in send order
        self._unsent: list[bytes] = []
        self._flush_handle: asyncio.Handle | None = None
        self._watchdog: asyncio.TimerHandle | None = None
        self.connects = 0  # connections opened: a test reads it

    async def call(self, command: bytes) -> Any:
        """Send one packed command (`pack`) and return its reply; error replies are raised."""
        if self._writer is None:
            await self._connect()
            if self._writer is None:  # lost again before this caller resumed
                raise RedisConnectionError("connection closed by the server")
        loop = asyncio.get_running_loop()
        reply = loop.create_future()
        now = loop.time()
        self._waiting.append((reply, now))
        self._unsent.append(command)
        if self._flush_handle is None:
            self._flush_handle = loop.call_soon(self._flush)
        if self._watchdog is None:
            self._watchdog = loop.call_at(now + self.timeout_s, self._check_late)
        result = await reply
        if isinstance(result, _ErrorReply):
            raise BaseParser.parse_error(str(result))
        return result

    async def close(self) -> None:
        writer, task = self._writer, self._reader_task
        self._fail(RedisConnectionError("connection closed"))
        if self._connecting is not None and not self._connecting.done():
            self._connecting.cancel()
        if task is not None:
            await asyncio.gather(task, return_exceptions=True)
        if writer is not None:
            with contextlib.suppress(OSError):
                await writer.wait_closed()

    # -- connecting ---------------------------------------------------------------------------

    async def _connect(self) -> None:
        # Callers that arrive while a connection is being opened wait for that one; one caller
        # giving up (cancelled) does not stop it for the others.
        if self._connecting is None:
            self._connecting = asyncio.ensure_future(self._open())
            self._connecting.add_done_callback(self._connected)
        await asyncio.shield(self._connecting)

    def _connected(self, done: asyncio.Future) -> None:
        self._connecting = None
        if not done.cancelled():
            done.exception()  # retrieved here: the callers that waited have raised it already

    async def _open(self) -> None:
        connection = self._make_connection()
        try:
            await connection.connect()  # connect, TLS, AUTH, SELECT: redis-py's handshake
        except BaseException:
            with contextlib.suppress(Exception):
                await connection.disconnect()
            raise
        # redis-py keeps its stream in these attributes (redis-py 5 to 8); a test covers the takeover.
        reader: asyncio.StreamReader = connection._reader
        self._connection, self._writer = connection, connection._writer
        self.connects += 1
        self._reader_task = asyncio.get_running_loop().create_task(self._read(reader, self._writer), name="cairn-redis-replies")

    # -- sending and receiving ----------------------------------------------------------------

    def _flush(self) -> None:
        self._flush_handle = None
        if self._unsent and self._writer is not None:
            self._writer.write(b"".join(self._unsent))
            self._unsent.clear()

    async def _read(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        parser = hiredis.Reader(replyError=_ErrorReply)
        waiting = self._waiting
        try:
            while True:
                data = await reader.read(READ_SIZE)
                if not data:
                    raise RedisConnectionError("connection closed by the server")
                parser.feed(data)
                reply = parser.gets()
                while reply is not False:
                    if not waiting:
                        raise RedisConnectionError("a reply came that no command waits for")
                    future = waiting.popleft()[0]
                    if not future.done():  # done: the caller gave up; the reply is dropped
                        future.set_result(reply)
                    reply = parser.gets()
        except Exception as exc:  # OSError, a protocol error, the closed stream: no reply can be trusted now
            if self._writer is writer:
                self._fail(exc if isinstance(exc, RedisConnectionError) else RedisConnectionError(f"{type(exc).__name__}: {exc}"))

    def _check_late(self) -> None:
        """The watchdog: the oldest command waiting past the timeout fails the connection."""
        self._watchdog = None
        if not self._waiting:
            return
        loop = asyncio.get_running_loop()
        due = self._waiting[0][1] + self.timeout_s
        if due <= loop.time():
            self._fail(RedisTimeoutError(f"no reply within {self.timeout_s:g} s"))
        else:
            self._watchdog = loop.call_at(due, self._check_late)

    def _fail(self, exc: BaseException) -> None:
        """Drop the connection; every command sent or queued on it fails with `exc`."""
        writer, task = self._writer, self._reader_task
        self._writer = self._reader_task = self._connection = None
        if writer is not None:
            writer.close()
        if task is not None and task is not asyncio.current_task():
            task.cancel()
        for handle in (self._flush_handle, self._watchdog):
            if handle is not None:
                handle.cancel()
        self._flush_handle = self._watchdog = None
        self._unsent.clear()
        waiting, self._waiting = self._waiting, deque()
        for future, _ in waiting:
            if not future.done():
                future.set_exception(exc)
