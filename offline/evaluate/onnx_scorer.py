"""An exported artifact as a `SessionScorer`, so the served graph goes through the same evaluation
as the PyTorch model and the baselines (and any difference between them shows up there).

`scoring` picks the path as the service's CAIRN_SCORING does (service/runtime/active.open_step),
`clustered@N` the clustered path probing N clusters as CAIRN_PROBE_CLUSTERS=N does:
exact scores every item; the other paths (fp16, int8, int4, clustered) return the best KEEP items each
as `TopLists` (the rest rank below them), which is what they serve, so their Recall@k and MRR@k
(k <= KEEP) show the offline cost of the approximation next to the exact row.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from service.artifacts.format import load_artifact
from service.errors import InputDataError
from service.runtime.active import Step, open_step
from service.runtime.onnx_step import OnnxStep

from offline.evaluate.scorer import TopLists
from offline.evaluate.scoring_paths import parse_scoring

KEEP = 100  # items a top-N path returns per click: above any k the evaluation reports, plus the visit's seen items


class OnnxScorer:
    def __init__(self, step: Step, name: str) -> None:
        self.name = name
        self.n_items = step.n_items
        self._step = step
        self._hidden = step.zero_hidden(0)  # [L, B, H]
        self._keep = min(KEEP, step.n_items)

    def begin(self, n_sessions: int) -> None:
        self._hidden = self._step.zero_hidden(n_sessions)  # [L, n, H]

    def advance(self, items: np.ndarray) -> np.ndarray | TopLists:
        items = np.ascontiguousarray(items, dtype=np.int64)  # [n]
        if isinstance(self._step, OnnxStep):
            self._hidden, scores = self._step.run_scores(items, self._hidden)  # [L, n, H], [n, n_items]
            return scores
        self._hidden, top_items, top_scores = self._step.run(items, self._hidden, self._keep)  # [n, KEEP] each
        return TopLists(top_items, top_scores, self.n_items)


def load_onnx_scorer(path: Path, threads: int = 1, scoring: str = "exact") -> OnnxScorer:
    """The artifact folder at `path`, verified, as a scorer named after its training loss (and the
    scoring path when it is not exact, with `@N` for a probe count given)."""
    path_name, probe = parse_scoring(scoring)
    artifact = load_artifact(Path(path))
    hyperparameters = artifact.manifest.get("hyperparameters") or {}
    loss = hyperparameters.get("loss") if isinstance(hyperparameters, dict) else None
    name = f"gru-{loss}-onnx" if isinstance(loss, str) and loss else "gru-onnx"
    step = open_step(artifact, path_name, threads, probe=probe)
    if step.scoring != path_name:  # the service would answer exactly; a row under this path's name would not be it
        step.close()
        skipped = artifact.manifest.get("item_clusters_skipped")
        why = f" ({skipped.get('reason')}; `cairn export --clustered-index always` builds it)" if path_name == "clustered" and isinstance(skipped, dict) else ""
        raise InputDataError(f"--scoring {scoring}: {path} has no files for that path{why}")
    if step.scoring == "exact":
        return OnnxScorer(step, name)
    return OnnxScorer(step, f"{name}-{step.scoring}" + (f"@{probe}" if probe and step.scoring == "clustered" else ""))
