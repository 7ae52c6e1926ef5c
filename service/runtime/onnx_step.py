"""One GRU step on ONNX Runtime: the exported `step.onnx` behind a small, allocation-light call.

The serving path imports numpy and onnxruntime only. The session is opened once; the output-name
lists and the `top_n` input arrays are prepared once, so a call builds nothing but its feed dict.
Errors from ONNX Runtime are translated at this boundary: a graph that cannot be opened or is not
a cairn step graph is an `ArtifactError`, a call that fails is a `StepError`.
"""

from __future__ import annotations

import inspect
from pathlib import Path

import numpy as np
import onnxruntime as ort
from onnxruntime.capi import onnxruntime_pybind11_state as _ort_state

from service.errors import ArtifactError, StepError

# ONNX Runtime raises its own exception classes (all direct subclasses of Exception) and, from
# its Python wrapper, the built-in ones below for feeds it cannot convert.
_ORT_ERRORS: tuple[type[BaseException], ...] = tuple(
    cls for _, cls in inspect.getmembers(_ort_state, inspect.isclass) if issubclass(cls, Exception)
) + (RuntimeError, ValueError, TypeError)

_INPUTS = ("items", "hidden", "top_n")
_OUTPUTS = ("next_hidden", "top_items", "top_scores", "scores")



def ort_errors() -> tuple[type[BaseException], ...]:
    """What ONNX Runtime raises from `run` (for other modules' except clauses)."""
    return _ORT_ERRORS


def open_session(path: Path, threads: int = 1, initializers: dict[str, ort.OrtValue] | None = None) -> ort.InferenceSession:
    """An ONNX Runtime session on the CPU with cairn's options; ArtifactError when it cannot be opened.
    `initializers` replace the graph's initialisers of those names (the caller keeps them alive
    as long as the session)."""
    if threads < 1:
        raise StepError(f"threads must be at least 1, got {threads}")
    options = ort.SessionOptions()
    for name, value in (initializers or {}).items():
        options.add_initializer(name, value)
    options.intra_op_num_threads = threads  # 1: no thread pool, the call runs on the caller's thread
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    options.log_severity_level = 4  # fatal only: failures come back as our exceptions, with ORT's message
    try:
        return ort.InferenceSession(str(path), sess_options=options, providers=["CPUExecutionProvider"])
    except _ORT_ERRORS as exc:
        raise ArtifactError(f"{path}: ONNX Runtime cannot open the step graph ({' '.join(str(exc).split())})") from exc


class _ClosedSession:
    """Stands in for the ONNX Runtime session after `OnnxStep.close`: a late call gets a StepError."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def run(self, *_: object) -> list[np.ndarray]:
        raise StepError(f"{self.path}: the step graph was closed")


class OnnxStep:
    """`step.onnx` of an artifact, opened once; `run` and `run_scores` advance a batch by one click."""

    scoring = "exact"  # every item in float32: the reference the reduced paths are measured against

    def __init__(self, path: Path, threads: int = 1) -> None:
        self.path = Path(path)
        self._session = open_session(self.path, threads)
        self.layers, self.hidden_size, self.n_items = self._read_sizes()
        self._run_outputs = ["next_hidden", "top_items", "top_scores"]
        self._score_outputs = ["next_hidden", "scores"]
        self._top_n: dict[int, np.ndarray] = {}  # top_n value -> its int64 [1] input, made once per value
        self._top_one = self._top_n_input(1)

    def _read_sizes(self) -> tuple[int, int, int]:
        inputs = {i.name: i for i in self._session.get_inputs()}
        outputs = {o.name: o for o in self._session.get_outputs()}
        if set(inputs) != set(_INPUTS) or not set(_OUTPUTS) <= set(outputs):
            raise ArtifactError(
                f"{self.path}: not a cairn step graph (inputs {sorted(inputs)}, outputs {sorted(outputs)}; "
                f"expected inputs {list(_INPUTS)} and outputs {list(_OUTPUTS)})"
            )
        hidden_shape = inputs["hidden"].shape  # [L, batch, H]
        scores_shape = outputs["scores"].shape  # [batch, n_items]
        if (
            len(hidden_shape) != 3
            or not isinstance(hidden_shape[0], int)
            or not isinstance(hidden_shape[2], int)
            or len(scores_shape) != 2
            or not isinstance(scores_shape[1], int)
        ):
            raise ArtifactError(f"{self.path}: step graph without fixed sizes (hidden {hidden_shape}, scores {scores_shape})")
        return hidden_shape[0], hidden_shape[2], scores_shape[1]

    def close(self) -> None:
        """Frees the ONNX Runtime session now rather than whenever the last reference goes (at worst
        in interpreter teardown, where native destructors run in no set order). No call may be running."""
        self._session = _ClosedSession(self.path)

    def zero_hidden(self, batch_size: int) -> np.ndarray:
        """The state of sessions that have not clicked yet: float32 [L, B, H] of zeros."""
        return np.zeros((self.layers, batch_size, self.hidden_size), dtype=np.float32)

    def run(self, items: np.ndarray, hidden: np.ndarray, top_n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """items int64 [B], hidden float32 [L, B, H] -> next_hidden [L, B, H], top_items int64 [B, top_n],
        top_scores float32 [B, top_n] (descending)."""
        k = self._top_n.get(top_n)
        if k is None:
            k = self._top_n_input(top_n)
        self._check(items, hidden)
        try:
            next_hidden, top_items, top_scores = self._session.run(self._run_outputs, {"items": items, "hidden": hidden, "top_n": k})
        except _ORT_ERRORS as exc:
            raise StepError(self._explain(items, hidden, exc)) from exc
        return next_hidden, top_items, top_scores

    def run_scores(self, items: np.ndarray, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """items int64 [B], hidden float32 [L, B, H] -> next_hidden [L, B, H], scores float32 [B, n_items]."""
        self._check(items, hidden)
        try:
            next_hidden, scores = self._session.run(self._score_outputs, {"items": items, "hidden": hidden, "top_n": self._top_one})
        except _ORT_ERRORS as exc:
            raise StepError(self._explain(items, hidden, exc)) from exc
        return next_hidden, scores

    def _top_n_input(self, top_n: int) -> np.ndarray:
        if not isinstance(top_n, (int, np.integer)) or isinstance(top_n, bool) or not 1 <= top_n <= self.n_items:
            raise StepError(f"top_n must be an integer from 1 to {self.n_items}, got {top_n!r}")
        k = np.array([top_n], dtype=np.int64)
        self._top_n[int(top_n)] = k
        return k

    def _check(self, items: np.ndarray, hidden: np.ndarray) -> None:
        # The few checks ONNX Runtime does not make: dtypes and shapes it checks itself (see
        # _explain), but an empty batch aborts the whole process inside onnxruntime 1.32, and
        # Gather accepts negative indices (counting from the end), so -1 would score the last item.
        if not isinstance(items, np.ndarray) or not isinstance(hidden, np.ndarray):
            raise StepError(f"items and hidden must be NumPy arrays, got {type(items).__name__} and {type(hidden).__name__}")
        if items.size == 0:
            raise StepError(f"{self.path}: a step needs at least one session, got items of shape {list(items.shape)}")
        if items.min() < 0:
            raise StepError(f"{self.path}: item indices must be from 0 to {self.n_items - 1}, got {int(items.min())}")

    def _explain(self, items: object, hidden: object, exc: BaseException) -> str:
        expect = f"items int64 [B], hidden float32 [{self.layers}, B, {self.hidden_size}], indices below {self.n_items}"
        got = (
            f"items {getattr(items, 'dtype', type(items).__name__)} {list(getattr(items, 'shape', []))}, "
            f"hidden {getattr(hidden, 'dtype', type(hidden).__name__)} {list(getattr(hidden, 'shape', []))}"
        )
        if isinstance(items, np.ndarray) and items.size and np.issubdtype(items.dtype, np.integer) and items.max() >= self.n_items:
            got += f", largest index {int(items.max())}"
        return f"{self.path}: step failed ({exc}); expected {expect}, got {got}"
