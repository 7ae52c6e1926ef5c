"""The run-time recommenders against plain references: sorting for popularity, the raw table for
neighbours, and OnnxStep called one click at a time for the batched GRU runner."""

from __future__ import annotations

import asyncio
import threading
import time

import numpy as np
import pytest

from service.artifacts.format import load_artifact
from service.runtime.batching import StepBatcher
from service.runtime.onnx_step import OnnxStep
from service.runtime.recommenders import GruRecommender, NeighbourRecommender, PopularityRecommender, without_seen


def test_popularity_order_with_ties_is_stable():
    counts = np.array([3, 9, 3, 1, 9, 0], dtype=np.float32)
    pop = PopularityRecommender(counts)
    reference = sorted(range(len(counts)), key=lambda i: (-counts[i], i))  # ties: lower index first
    assert pop.top(6).items == reference
    assert pop.top(3, seen={4}).items == [1, 0, 2]
    assert pop.top(10).items == reference  # never more than there are
    assert pop.top(2, seen={1}).scores == [9.0, 3.0]


def test_neighbours_slice_rows_exclude_seen_and_top_up_from_popularity():
    rows = np.array([[2, 1, -1], [0, -1, -1], [1, 0, 3], [-1, -1, -1]], dtype=np.int32)
    scores = np.array([[0.9, 0.5, 0], [0.7, 0, 0], [0.8, 0.6, 0.1], [0, 0, 0]], dtype=np.float32)
    pop = PopularityRecommender(np.array([1, 2, 3, 4], dtype=np.float32))  # order 3, 2, 1, 0
    nb = NeighbourRecommender(rows, scores, pop)
    r = nb.neighbours_of(0, 2)
    assert r.items == [2, 1] and r.scores == pytest.approx([0.9, 0.5])
    r = nb.neighbours_of(2, 3, seen=frozenset({1, 2}))
    assert r.items == [0, 3]  # only two left once 1 and 2 are gone, and popularity has nothing else
    r = nb.neighbours_of(1, 3, seen=frozenset({1}))
    assert r.items == [0, 3, 2] and r.scores == pytest.approx([0.7, 0, 0])
    r = nb.neighbours_of(3, 2)  # no neighbours at all: popularity
    assert r.items == [3, 2]
    assert asyncio.run(nb.rank(-1, 2)).items == [3, 2]


def test_without_seen_keeps_order():
    r = without_seen([5, 3, 8, 1], [4.0, 3.0, 2.0, 1.0], {3, 1}, 5)
    assert r.items == [5, 8] and r.scores == [4.0, 2.0]
    assert without_seen([5, 3, 8, 1], [4.0, 3.0, 2.0, 1.0], {3}, 2).items == [5, 8]
    assert without_seen([5, 3, 8], [3.0, 2.0, 1.0], frozenset(), 2).items == [5, 3]


@pytest.fixture(scope="module", params=[1, 2], ids=["one-layer", "two-layers"])
def graph(request, tmp_path_factory):
    from offline.export.artifact_writer import write_random_artifact

    path = write_random_artifact(tmp_path_factory.mktemp("rec"), "g", "v1", n_items=300, hidden_size=16, layers=request.param, seed=5)
    return load_artifact(path), OnnxStep(path / "step.onnx")


def test_batched_steps_equal_single_steps(graph):
    artifact, step = graph
    rng = np.random.default_rng(0)
    items = rng.integers(0, artifact.n_items, size=40)
    hiddens = rng.normal(size=(40, step.layers, step.hidden_size)).astype(np.float32)  # [clicks, L, H]
    top_ns = rng.integers(1, 30, size=40)

    async def go():
        batcher = StepBatcher(step, max_batch=16)
        batcher.start()
        try:
            results = await asyncio.gather(*(batcher.run(int(i), h, int(k)) for i, h, k in zip(items, hiddens, top_ns)))
        finally:
            await batcher.close()
        return results, batcher.batches, batcher.clicks

    results, batches, clicks = asyncio.run(go())
    assert clicks == 40 and batches < 40  # waiting clicks shared calls
    for (nh, top, sc), i, h, k in zip(results, items, hiddens, top_ns):
        ref_h, ref_top, ref_sc = step.run(np.array([i], dtype=np.int64), h[:, None, :].copy(), int(k))  # B = 1
        assert np.allclose(nh, ref_h[:, 0, :], atol=1e-6)
        assert top.tolist() == ref_top[0].tolist()
        assert np.allclose(sc, ref_sc[0], atol=1e-5)


def test_gru_rank_repeats_the_last_step(graph):
    artifact, step = graph

    async def go():
        batcher = StepBatcher(step)
        batcher.start()
        gru = GruRecommender(batcher)
        try:
            state = gru.start()
            state = await gru.advance(state, 3)
            state, ranked = await gru.step(state, 7, 5, seen=frozenset({3, 7}))
            again = await gru.rank(state, 5, seen=frozenset({3, 7}))
            with pytest.raises(ValueError):
                await gru.rank(gru.start(), 5)
        finally:
            await batcher.close()
        return ranked, again

    ranked, again = asyncio.run(go())
    h = step.zero_hidden(1)
    h, _, _ = step.run(np.array([3]), h, 1)
    _, top, _ = step.run(np.array([7]), h, artifact.n_items)
    reference = [i for i in top[0].tolist() if i not in (3, 7)][:5]
    assert ranked.items == again.items == reference


def test_closed_batcher_refuses_work(graph):
    from service.errors import StepError

    _, step = graph

    async def go():
        batcher = StepBatcher(step)
        with pytest.raises(StepError):
            await batcher.run(0, np.zeros((step.layers, step.hidden_size), np.float32), 1)  # never started
        batcher.start()
        await batcher.close()
        with pytest.raises(StepError):
            await batcher.run(0, np.zeros((step.layers, step.hidden_size), np.float32), 1)

    asyncio.run(go())


class RecordingStep:
    """The real step, recording which thread ran each call, optionally `delay_s` slower (time.sleep:
    a call that holds its thread, as a stalled ONNX Runtime call would)."""

    def __init__(self, real) -> None:
        self.real = real
        self.layers, self.hidden_size, self.n_items = real.layers, real.hidden_size, real.n_items
        self.delay_s = 0.0
        self.threads: list[str] = []
        self.finished = 0  # calls that returned

    def run(self, items, hidden, top_n):
        self.threads.append(threading.current_thread().name)
        if self.delay_s:
            time.sleep(self.delay_s)
        out = self.real.run(items, hidden, top_n)
        self.finished += 1
        return out


def test_lone_clicks_run_on_the_loop_until_one_is_slow_and_batches_on_the_thread(graph):
    artifact, real = graph
    step = RecordingStep(real)
    zero = np.zeros((step.layers, step.hidden_size), np.float32)

    async def go():
        batcher = StepBatcher(step, inline_max_s=0.002)
        batcher.start()
        try:
            lone = [await batcher.run_timed(5, zero, 3)]  # 1: fast, on the loop
            step.delay_s = 0.005
            lone.append(await batcher.run_timed(6, zero, 3))  # 2: on the loop, too slow: the next goes to the thread
            step.delay_s = 0.0
            lone.append(await batcher.run_timed(7, zero, 3))  # 3: on the thread, fast again
            lone.append(await batcher.run_timed(8, zero, 3))  # 4: back on the loop
            together = await asyncio.gather(*(batcher.run(i, zero, 3) for i in range(10, 14)))  # 5: one call of 4
        finally:
            await batcher.close()
        return lone, together, batcher.inline_calls, batcher.batches

    lone, together, inline_calls, batches = asyncio.run(go())
    loop_thread = threading.main_thread().name
    assert step.threads[:4] == [loop_thread, loop_thread, step.threads[2], loop_thread]
    assert step.threads[2].startswith("cairn-ort") and step.threads[4].startswith("cairn-ort")
    assert (inline_calls, batches, len(step.threads)) == (3, 5, 5)
    assert lone[1][3] >= 0.005 > lone[0][3]  # the reported step time is the call's own
    for (nh, top, _, _, _), item in zip(lone, (5, 6, 7, 8)):
        ref_h, ref_top, _ = real.run(np.array([item], dtype=np.int64), zero[:, None, :].copy(), 3)
        assert np.allclose(nh, ref_h[:, 0, :], atol=1e-6) and top.tolist() == ref_top[0].tolist()
    for (nh, top, _), item in zip(together, range(10, 14)):
        ref_h, ref_top, _ = real.run(np.array([item], dtype=np.int64), zero[:, None, :].copy(), 3)
        assert np.allclose(nh, ref_h[:, 0, :], atol=1e-6) and top.tolist() == ref_top[0].tolist()


def test_inline_steps_can_be_turned_off(graph):
    _, real = graph
    step = RecordingStep(real)

    async def go():
        batcher = StepBatcher(step, inline_max_s=0.0)
        batcher.start()
        try:
            for i in range(3):
                await batcher.run(i, np.zeros((step.layers, step.hidden_size), np.float32), 2)
        finally:
            await batcher.close()
        return batcher.inline_calls

    assert asyncio.run(go()) == 0
    assert all(name.startswith("cairn-ort") for name in step.threads)


def test_closing_waits_for_the_running_step_and_a_closed_step_refuses_calls(graph, tmp_path):
    from offline.export.artifact_writer import write_random_artifact
    from service.errors import StepError

    _, real = graph
    step = RecordingStep(real)
    step.delay_s = 0.2
    zero = np.zeros((step.layers, step.hidden_size), np.float32)

    async def go():
        batcher = StepBatcher(step, inline_max_s=0.0)
        batcher.start()
        running = asyncio.ensure_future(batcher.run(3, zero, 2))
        while not step.threads:
            await asyncio.sleep(0.01)  # until the step is sleeping on the worker thread
        await batcher.close()
        finished_at_close = step.finished
        with pytest.raises(StepError, match="not running"):
            await batcher.run(4, zero, 2)
        with pytest.raises(StepError, match="was closed"):
            await running  # the click that was being scored is answered, not left waiting
        return finished_at_close

    assert asyncio.run(go()) == 1  # close returned only once the step on the thread was done with the session

    own = OnnxStep(write_random_artifact(tmp_path, "c", "v1", n_items=20, hidden_size=4, seed=1) / "step.onnx")
    own.run(np.array([1]), own.zero_hidden(1), 3)
    own.close()
    with pytest.raises(StepError, match="was closed"):
        own.run(np.array([1]), own.zero_hidden(1), 3)
    with pytest.raises(StepError, match="was closed"):
        own.run_scores(np.array([1]), own.zero_hidden(1))
