"""One GRU step with reduced-precision scoring: approximate top candidates, then exact re-scoring.

Scoring every item is memory-bandwidth bound: at a million items and D = 100 one click reads
400 MB of float32 output vectors. This path reads a half of that (fp16), a quarter (int8) or
a fifth (int4 at D = 100: 64 bytes of codes and 16 of block scales an item):

    x = embedding[items]                        numpy, rows of a read-only memory map
    next_hidden, f = features.onnx(x, hidden)   ONNX Runtime, the GRU without item tables
    candidates = candidates_<p>.onnx(f, ...)    ONNX Runtime: approximate score of every item,
                                                the best `candidates_for(top_n)` of them
    exact = vectors[candidates] . f + bias      numpy, float32, the candidates only
    top_n of the exact scores                   so answers carry exact fp32 scores

The fp16 table goes into ONNX Runtime as an input, fed from the memory map each call (CPU inputs
are used in place, not copied), so the pages are the OS's page cache, shared by every worker. The
int4 and int8 tables go in once, as the graph's initialisers, and ONNX Runtime packs a private
copy of each for its integer kernels (about 80 MB for int4 and 100 MB for int8 at a million
items): int4 is the cheapest for one click at a time, int8 for a shared pass of several (8 rows
cost it 1.3x one row, int4 7x). int8 graphs of artifacts exported before it was packed take the
table as an input, with the features quantised here. Same call contract as `OnnxStep.run`;
`scoring` names the path, `last_scoring` the table the last call read (Server-Timing, metrics).

The `int4+int8` path holds both packed tables and scores each call with the one that is cheaper
for its number of rows: int4 for a lone click (or two), int8 for a shared pass. Where the two
cross depends on the CPU (its integer instructions, its memory bandwidth), so the step times both
graphs at load for 1 to SMALL_BATCH_MAX rows and keeps int4 for the sizes it won; where it won
none, int4's session is closed again and the step is plain int8.
"""

from __future__ import annotations

import logging
import time

import numpy as np
import onnxruntime as ort

from service.artifacts.item_vectors import FEATURE_ZERO_POINT, ItemVectors
from service.errors import StepError
from service.runtime.feature_step import FeatureStep, touch_pages
from service.runtime.onnx_step import open_session

# The exact re-scoring looks at this many candidates per row at least (and 4 x top_n when more
# are asked for): enough for the approximate ranking's errors near the top 20 to be caught
# (tests/service/runtime/test_reduced_step.py measures agreement; at a million random items the
# top 20 of 256 visit states came back whole from 48 int4 candidates, from 32 int8 ones). Fewer
# candidates cost less: ONNX Runtime's TopK of 512 over a batch of 8 x 200,000 scores took
# 2.9 ms here, of 64 1.1 ms.
MIN_CANDIDATES = 128
SMALL_BATCH_MAX = 4  # rows the small-batch table is timed for at load
_TIMING_RUNS = 5  # timed calls per graph and size, taking turns (the fastest counts), after one untimed

log = logging.getLogger("cairn.runtime")


def candidates_for(top_n: int, n_items: int) -> int:
    return min(n_items, max(MIN_CANDIDATES, 4 * top_n))


def quantise_rows(features: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """float32 [B, D] -> uint8 [B, D] (code + 128), float32 scales [B, 1]: symmetric per row,
    scale = max|f| / 127, code in -127..127 (common practice), so |f - scale * code| <= scale / 2."""
    scales = np.abs(features).max(axis=1, keepdims=True) / 127.0  # [B, 1]
    scales[scales == 0] = 1.0
    codes = np.rint(features / scales) + FEATURE_ZERO_POINT
    return codes.astype(np.uint8), scales.astype(np.float32)


class ReducedStep(FeatureStep):
    """`OnnxStep`'s `run` for an artifact with item vectors, scoring in `precision` (fp16 | int8 | int4),
    and with `small` (int4 beside int8: the int4+int8 path) batches of few rows in that one."""

    def __init__(self, tables: ItemVectors, precision: str, threads: int = 1, small: str | None = None, small_up_to: int | None = None) -> None:
        """`small`: a second packed precision for batches of few rows (`int4` beside `int8`), kept
        for the sizes it scores faster at load (or, given `small_up_to`, for batches of up to that
        many rows)."""
        for p in (precision, small):
            if p is not None and p not in tables.codes:
                raise StepError(f"no {p!r} item vectors; the artifact has {', '.join(tables.codes)}")
        if small is not None and (small == precision or not {small, precision} <= set(tables.packed)):
            raise StepError(f"a small-batch table needs two packed precisions, got {small!r} beside {precision!r} (packed: {', '.join(tables.packed)})")
        super().__init__(tables, threads)
        self.precision = precision
        self.scoring = self.last_scoring = precision
        self._feed = {"bias": tables.bias}
        self._packed = precision in tables.packed
        self._tables: dict[str, ort.OrtValue] = {}  # kept alive as long as the sessions
        if self._packed:
            self._candidates = self._open_packed(precision, threads)
        else:
            self._candidates = open_session(tables.candidate_graphs[precision], threads)
        self.small_scoring: str | None = None
        self.small_up_to = 0  # batches of up to this many rows read the small-batch table
        self._small: ort.InferenceSession | None = None
        if small is not None:
            self._small = self._open_packed(small, threads)
            self.small_up_to = self._rows_scored_faster(self._small, self._candidates) if small_up_to is None else small_up_to
            if self.small_up_to:
                self.small_scoring, self.scoring = small, f"{small}+{precision}"
            else:
                self._small = None  # ONNX Runtime's packed copy goes with the session
                for name in ("codes", "scales"):
                    self._tables.pop(f"{small}:{name}")
            log.info("%s scores batches of up to %d rows from its %s table, larger ones from %s", tables.feature_graph.parent, self.small_up_to, small, precision)
        if not self._packed:
            self._feed["codes"] = tables.codes[precision]
            touch_pages(tables.codes[precision])  # read whole by every click
            if precision == "int8":
                self._feed["scales"] = tables.scales
        touch_pages(tables.vectors)  # the candidates' rows, anywhere in the table
        self._k: dict[int, np.ndarray] = {}

    def _open_packed(self, precision: str, threads: int) -> ort.InferenceSession:
        # The table goes in as the graph's initialisers (see build_int4_candidate_graph), over
        # the memory maps; ONNX Runtime packs its own copy when the session opens.
        scales = self.tables.int4_scales if precision == "int4" else self.tables.scales
        given = {"codes": ort.OrtValue.ortvalue_from_numpy(self.tables.codes[precision]), "scales": ort.OrtValue.ortvalue_from_numpy(scales)}
        self._tables.update({f"{precision}:{name}": value for name, value in given.items()})
        return open_session(self.tables.candidate_graphs[precision], threads, given)

    def _rows_scored_faster(self, small: ort.InferenceSession, large: ort.InferenceSession) -> int:
        """The largest batch size, up to SMALL_BATCH_MAX, such that `small` ranked every size up to
        it faster than `large` (the fastest of _TIMING_RUNS calls each, on seeded features; the two
        take turns, so a change in the machine's speed meanwhile hits both alike)."""
        rng = np.random.default_rng(0)
        k = np.array([candidates_for(20, self.n_items)], dtype=np.int64)
        dim = self.tables.vectors.shape[1]

        def timed(session: ort.InferenceSession, feed: dict[str, np.ndarray]) -> float:
            t0 = time.perf_counter()
            session.run(None, feed)
            return time.perf_counter() - t0

        up_to = 0
        for rows in range(1, SMALL_BATCH_MAX + 1):
            feed = {"features": rng.standard_normal((rows, dim)).astype(np.float32), "k": k, **self._feed}
            small.run(None, feed), large.run(None, feed)  # untimed: first calls of a shape set up buffers
            best_small = best_large = float("inf")
            for _ in range(_TIMING_RUNS):
                best_small = min(best_small, timed(small, feed))
                best_large = min(best_large, timed(large, feed))
            if best_small >= best_large:
                break
            up_to = rows
        return up_to

    def _query(self, features: np.ndarray) -> dict[str, np.ndarray]:
        if self._packed or self.precision == "fp16":  # float32 features (the packed graphs quantise them themselves)
            return {"features": features}
        codes, scales = quantise_rows(features)  # an int8 graph of an older export
        return {"features": codes, "feature_scales": scales}

    def close(self) -> None:
        super().close()
        self._candidates = self._small = None

    def rank(self, features: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray]:
        k = candidates_for(top_n, self.n_items)
        k_in = self._k.get(k)
        if k_in is None:
            k_in = self._k[k] = np.array([k], dtype=np.int64)
        if len(features) <= self.small_up_to:
            session, self.last_scoring = self._small, self.small_scoring
        else:
            session, self.last_scoring = self._candidates, self.precision
        candidates, _ = session.run(None, {**self._query(features), "k": k_in, **self._feed})  # [B, k]
        exact = np.einsum("bkd,bd->bk", self.tables.vectors[candidates], features) + self.tables.bias[candidates]  # [B, k]
        order = np.argsort(-exact, axis=1, kind="stable")[:, :top_n]  # [B, top_n]
        return np.take_along_axis(candidates, order, 1), np.take_along_axis(exact, order, 1).astype(np.float32)
