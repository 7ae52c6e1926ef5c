"""The bounded buffer between the click path and the sink, and the task that empties it.

`record` is all a click pays: one tuple appended to a list, no await, no I/O; when the buffer
holds CAIRN_EVENTS_BUFFER events the new one is dropped and counted instead, so a slow or broken
sink never slows or fails a click. The writer task takes the whole buffer every
CAIRN_EVENTS_FLUSH_S (or sooner once a batch's worth waits), serialises it and writes it in one
call. A batch the sink refused is retried first at the next flush (the buffer keeps filling, up
to its bound). `close` (shutdown) stops the task and writes what is left, within `close_s`.

What a kill (SIGKILL, OOM) loses: the events not yet written, at most the buffer, in practice the
last flush interval's worth. Everything `written` counts is in the sink.
"""

from __future__ import annotations

import asyncio
import json
import logging
import time
from typing import Any

from service.errors import EventSinkError
from service.events.event import as_record
from service.events.sinks import EventSink
from service.runtime.tasks import stop_task

log = logging.getLogger("cairn.service")

BATCH = 2_000  # events per sink call at most; a fuller buffer wakes the writer early
SLICE = 64  # events serialised between two returns to the event loop (a few hundred microseconds)


class EventLog:
    def __init__(self, sink: EventSink, capacity: int, flush_s: float) -> None:
        self.sink = sink
        self.capacity = capacity
        self.flush_s = flush_s
        self.dropped = 0  # events refused because the buffer was full
        self.written = 0  # events the sink acknowledged
        self._buffer: list[tuple[Any, ...]] = []
        self._pending: list[bytes] = []  # serialised, refused once by the sink, written first next time
        self._wake = asyncio.Event()
        self._task: asyncio.Task | None = None
        self._failing = False
        self._dropped_logged = 0

    def record(self, event: tuple[Any, ...]) -> None:
        buffer = self._buffer
        if len(buffer) + len(self._pending) >= self.capacity:
            self.dropped += 1
            return
        buffer.append(event)
        if len(buffer) == BATCH:
            self._wake.set()

    @property
    def buffered(self) -> int:
        return len(self._buffer) + len(self._pending)

    def start(self) -> None:
        self._task = asyncio.get_running_loop().create_task(self._run(), name="cairn-event-writer")

    async def _run(self) -> None:
        while True:
            try:
                async with asyncio.timeout(self.flush_s):
                    await self._wake.wait()
            except TimeoutError:
                pass
            self._wake.clear()
            await self.flush()

    async def flush(self) -> bool:
        """Write everything buffered; False when the sink refused (the events stay for the next try)."""
        if self.dropped != self._dropped_logged:  # once per flush at most, not once per click
            log.warning("event buffer full: %d click events dropped so far (CAIRN_EVENTS_BUFFER=%d)", self.dropped, self.capacity)
            self._dropped_logged = self.dropped
        if self._buffer:
            taken, self._buffer = self._buffer, []
            dumps = json.dumps
            # In slices, giving the event loop back between them: serialising a whole second of
            # clicks at once would stall the clicks waiting behind it by milliseconds (their p99).
            for start in range(0, len(taken), SLICE):
                self._pending.extend(dumps(as_record(e), separators=(",", ":")).encode() for e in taken[start : start + SLICE])
                await asyncio.sleep(0)
        while self._pending:
            batch = self._pending[:BATCH]
            try:
                await self.sink.write(batch)
            except EventSinkError as exc:
                if not self._failing:
                    log.warning("event sink failing, keeping up to %d events and retrying: %s", self.capacity, exc)
                self._failing = True
                return False
            del self._pending[: len(batch)]
            self.written += len(batch)
            if self._failing:
                log.info("event sink works again")
                self._failing = False
        return True

    async def close(self, close_s: float = 5.0) -> None:
        """Stop the writer and write what is left (within `close_s`); what cannot be written is logged."""
        if self._task is not None:
            await stop_task(self._task)
            self._task = None
        deadline = time.monotonic() + close_s
        try:
            while self.buffered and time.monotonic() < deadline:
                async with asyncio.timeout(max(deadline - time.monotonic(), 0.01)):
                    if not await self.flush():
                        await asyncio.sleep(0.1)
        except TimeoutError:
            pass
        if self.buffered:
            log.error("shutting down with %d click events not written to the %s sink", self.buffered, self.sink.kind)
        await self.sink.close()
