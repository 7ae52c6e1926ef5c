"""The GRU step runner: clicks that wait while a step runs are scored together in the next one.

Scoring every item reads the whole output matrix once per call, whatever the batch size, so the
call is memory-bandwidth bound and sharing one pass between waiting clicks is the only way past the
single-click rate of a core. One task drains an asyncio queue: it takes the first waiting click,
then every other one already queued (up to `max_batch`), runs ONNX Runtime on them in one worker
thread, and hands each caller its row. There is no fixed wait: under light traffic a batch is one
click and pays no added latency.
"""

from __future__ import annotations

import asyncio
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from service.runtime.onnx_step import OnnxStep, StepError


@dataclass
class _Pending:
    item: int
    hidden: np.ndarray  # float32 [L, H]
    top_n: int
    future: asyncio.Future


class StepBatcher:
    """Shares `OnnxStep.run` calls between concurrent clicks; create and close it on the event loop."""

    def __init__(self, step: OnnxStep, max_batch: int = 64) -> None:
        if max_batch < 1:
            raise ValueError(f"max_batch must be at least 1, got {max_batch}")
        self.step = step
        self.max_batch = max_batch
        self.layers, self.hidden_size, self.n_items = step.layers, step.hidden_size, step.n_items
        self._queue: asyncio.Queue[_Pending] = asyncio.Queue()
        # ONNX Runtime reads contiguous inputs; one pair of buffers per batch size, made on first use.
        self._buffers: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="cairn-ort")
        self._task: asyncio.Task | None = None
        self.batches = 0  # calls made, and clicks they scored: their ratio is the mean batch size
        self.clicks = 0

    def start(self) -> None:
        if self._task is None:
            self._task = asyncio.get_running_loop().create_task(self._drain(), name="cairn-step-batcher")

    async def run(self, item: int, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """One click: item index, hidden float32 [L, H] -> next hidden [L, H], top items int64 [top_n], scores [top_n]."""
        if self._task is None or self._task.done():
            raise StepError("the step runner is not running")
        future = asyncio.get_running_loop().create_future()
        self._queue.put_nowait(_Pending(item, hidden, top_n, future))
        return await future

    async def close(self) -> None:
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except asyncio.CancelledError:
                pass
        while not self._queue.empty():
            pending = self._queue.get_nowait()
            if not pending.future.done():
                pending.future.set_exception(StepError("the step runner was closed"))
        self._executor.shutdown(wait=False, cancel_futures=True)

    async def _drain(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            batch = [await self._queue.get()]
            while len(batch) < self.max_batch and not self._queue.empty():
                batch.append(self._queue.get_nowait())
            batch = [p for p in batch if not p.future.done()]  # callers past their deadline left
            if not batch:
                continue
            items, hidden = self._fill(batch)
            top_n = max(p.top_n for p in batch)
            try:
                next_hidden, top_items, top_scores = await loop.run_in_executor(
                    self._executor, self.step.run, items, hidden, top_n
                )  # [L, B, H], [B, top_n], [B, top_n]
            except Exception as exc:  # noqa: BLE001 - every caller of the batch gets the failure
                for p in batch:
                    if not p.future.done():
                        p.future.set_exception(exc)
                continue
            self.batches += 1
            self.clicks += len(batch)
            for b, p in enumerate(batch):
                if not p.future.done():
                    # Copies: a row outlives the batch's output arrays in the caller's session state.
                    p.future.set_result(
                        (np.ascontiguousarray(next_hidden[:, b, :]), top_items[b, : p.top_n], top_scores[b, : p.top_n])
                    )

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
