"""The GRU step runner: clicks that wait while a step runs are scored together in the next one.

Scoring every item reads the whole output matrix once per call, whatever the batch size, so the
call is memory-bandwidth bound and sharing one pass between waiting clicks is the only way past the
single-click rate of a core. One task drains an asyncio queue: it takes the first waiting click,
then every other one already queued (up to `max_batch`), runs ONNX Runtime on them in one call,
and hands each caller its row. There is no fixed wait: under light traffic a batch is one click and
pays no added latency.

Where the call runs: a batch of several clicks, on a worker thread, so the event loop goes on
reading requests meanwhile and a call that runs past a request's deadline can be abandoned. A
lone click, on the event loop itself, as long as the lone steps before it took under
`inline_max_s` (default 2 ms; measured here about 0.3-0.6 ms at 40,000 items): the hand-over to a
thread and back costs a tenth of such a step, and the loop has nothing else to do while it waits.
The drain task runs after every request that became ready in the same loop iteration, so clicks
arriving together still share one call. One slow lone step sends the next ones to the thread again,
until a lone step there is fast once more.
"""

from __future__ import annotations

import asyncio
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from service.runtime.onnx_step import OnnxStep
from service.errors import StepError
from service.runtime.returning_clicks import ReturnWatch
from service.runtime.tasks import stop_task

INLINE_MAX_S = 0.002


@dataclass
class _Pending:
    item: int
    hidden: np.ndarray  # float32 [L, H]
    top_n: int
    future: asyncio.Future


class StepBatcher:
    """Shares `OnnxStep.run` calls between concurrent clicks; create and close it on the event loop."""

    def __init__(self, step: OnnxStep, max_batch: int = 64, inline_max_s: float = INLINE_MAX_S) -> None:
        if max_batch < 1:
            raise ValueError(f"max_batch must be at least 1, got {max_batch}")
        self.step = step
        self.max_batch = max_batch
        self.inline_max_s = inline_max_s  # 0: every call on the worker thread
        self._inline = inline_max_s > 0  # the last lone step was fast enough to run the next on the loop
        self.inline_calls = 0
        self.layers, self.hidden_size, self.n_items = step.layers, step.hidden_size, step.n_items
        self._queue: asyncio.Queue[_Pending] = asyncio.Queue()
        # ONNX Runtime reads contiguous inputs; one pair of buffers per batch size, made on first use.
        self._buffers: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="cairn-ort")
        self._task: asyncio.Task | None = None
        self._returns = ReturnWatch()
        self._arrival = asyncio.Event()  # set by each click queued while the drain task waits for more
        self.batches = 0  # calls made, and clicks they scored: their ratio is the mean batch size
        self.clicks = 0
        self.held_clicks = 0  # clicks a step was held for and caught (see returning_clicks)

    def start(self) -> None:
        if self._task is None:
            self._task = asyncio.get_running_loop().create_task(self._drain(), name="cairn-step-batcher")

    async def run(self, item: int, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """One click: item index, hidden float32 [L, H] -> next hidden [L, H], top items int64 [top_n], scores [top_n]."""
        next_hidden, top_items, top_scores, _, _ = await self.run_timed(item, hidden, top_n)
        return next_hidden, top_items, top_scores

    async def run_timed(self, item: int, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, str]:
        """`run`, the seconds ONNX Runtime spent on the call that scored this click (the whole batch:
        the rest of the time the caller waited went to the queue and the thread hand-over), and the
        scoring path of that call (a step with two tables picks one per call)."""
        if self._task is None or self._task.done():
            raise StepError("the step runner is not running")
        future = asyncio.get_running_loop().create_future()
        self._queue.put_nowait(_Pending(item, hidden, top_n, future))
        self._returns.arrived(time.perf_counter())
        self._arrival.set()
        return await future

    async def close(self) -> None:
        if self._task is not None:
            await stop_task(self._task)
        waiting = []
        while not self._queue.empty():
            waiting.append(self._queue.get_nowait())
        _fail(waiting, StepError("the step runner was closed"))
        # A step still running on the worker thread finishes first: the owner may free the step next.
        await asyncio.to_thread(self._executor.shutdown, wait=True, cancel_futures=True)

    async def _drain(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            batch = [await self._queue.get()]
            self._take_queued(batch)
            try:
                await self._wait_for_returning(batch)
            except asyncio.CancelledError:
                _fail(batch, StepError("the step runner was closed"))
                raise
            batch = [p for p in batch if not p.future.done()]  # callers past their deadline left
            if not batch:
                continue
            items, hidden = self._fill(batch)
            top_n = max(p.top_n for p in batch)
            lone = len(batch) == 1
            inline = lone and self._inline
            try:
                if inline:
                    self.inline_calls += 1
                    next_hidden, top_items, top_scores, step_s, scoring = self._timed_step(items, hidden, top_n)
                else:
                    next_hidden, top_items, top_scores, step_s, scoring = await loop.run_in_executor(
                        self._executor, self._timed_step, items, hidden, top_n
                    )  # [L, B, H], [B, top_n], [B, top_n], seconds, path
            except asyncio.CancelledError:  # closed mid-step: its callers get an answer, not a wait
                _fail(batch, StepError("the step runner was closed"))
                raise
            except Exception as exc:  # noqa: BLE001 - every caller of the batch gets the failure
                _fail(batch, exc)
                continue
            if lone:
                self._inline = step_s < self.inline_max_s
            # A step run on the loop opens no window: requests that came in meanwhile are read only
            # after it, so their arrival times tell nothing of returns (and it is too short to pay).
            self._returns.step_ended(time.perf_counter(), len(batch), 0.0 if inline else step_s)
            self.batches += 1
            self.clicks += len(batch)
            for b, p in enumerate(batch):
                if not p.future.done():
                    # Copies: a row outlives the batch's output arrays in the caller's session state.
                    p.future.set_result(
                        (np.ascontiguousarray(next_hidden[:, b, :]), top_items[b, : p.top_n], top_scores[b, : p.top_n], step_s, scoring)
                    )

    def _take_queued(self, batch: list[_Pending]) -> None:
        while len(batch) < self.max_batch and not self._queue.empty():
            batch.append(self._queue.get_nowait())

    async def _wait_for_returning(self, batch: list[_Pending]) -> None:
        """Add to `batch` the clicks the return watch expects back soon, until they are in or its
        window closes."""
        while len(batch) < self.max_batch:
            now = time.perf_counter()
            more, until = self._returns.wait_for(now)
            if more <= 0:
                return
            self._arrival.clear()
            try:
                await asyncio.wait_for(self._arrival.wait(), until - now)
            except TimeoutError:
                return
            before = len(batch)
            self._take_queued(batch)
            self.held_clicks += len(batch) - before

    def _timed_step(self, items: np.ndarray, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, str]:
        t0 = time.perf_counter()
        next_hidden, top_items, top_scores = self.step.run(items, hidden, top_n)
        step_s = time.perf_counter() - t0
        # Read here, on the thread that ran the step, before the next batch can change it.
        return next_hidden, top_items, top_scores, step_s, getattr(self.step, "last_scoring", None) or getattr(self.step, "scoring", "exact")

    def _fill(self, batch: list[_Pending]) -> tuple[np.ndarray, np.ndarray]:
        size = len(batch)
        buffers = self._buffers.get(size)
        if buffers is None:
            buffers = (np.empty(size, dtype=np.int64), np.empty((self.layers, size, self.hidden_size), dtype=np.float32))
            self._buffers[size] = buffers
        items, hidden = buffers  # [B], [L, B, H]
        for b, p in enumerate(batch):
            items[b] = p.item
            hidden[:, b, :] = p.hidden
        return items, hidden


def _fail(pending: list[_Pending], exc: BaseException) -> None:
    """Every caller still waiting in `pending` gets `exc`."""
    for p in pending:
        if not p.future.done():
            p.future.set_exception(exc)
