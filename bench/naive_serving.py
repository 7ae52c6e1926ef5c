"""Serving set-ups a team might build instead of cairn's, for the side-by-side benchmark only.

    python -m bench.naive_serving --variant torch-eager --artifact DIR --checkpoint FILE --port N

The same request and answer as `POST /v1/sessions/{id}/clicks` of the service (the service's own
request schema, the same JSON answer), on the same FastAPI/uvicorn/uvloop/httptools stack, with the
visit's clicks kept in this process. What differs is how a click becomes a ranking:

- torch-eager: the PyTorch model inside the request (`torch.no_grad`): one `step` from the kept
  hidden state, `score_all`, `topk`;
- recompute-onnx: no hidden state kept; the exported step graph is run over the visit's whole
  click history from the zero state, one step per click, on every request;
- recompute-torch: no hidden state kept; `nn.GRU` runs over the whole history as one sequence on
  every request, then `score_all` and `topk`.

Every variant leaves out the visit's recent clicks when asked, as many as the service does,
so all of them answer the same list for the same visit. The work runs inline in the handler: at
concurrency 1 that is their cheapest form (no thread hop), which flatters them, not cairn.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import time
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Annotated, Any

import numpy as np
from fastapi import FastAPI, Path as PathParam, Request
from fastapi.responses import Response

from service.api.schemas import SESSION_ID_MAX, SESSION_ID_PATTERN, ClickRequest
from service.artifacts.format import load_artifact
from service.config import Settings
from service.runtime.onnx_step import OnnxStep
from service.runtime.recommenders import without_seen

VARIANTS = ("torch-eager", "recompute-onnx", "recompute-torch")
HISTORY_LENGTH: int = Settings.model_fields["history_length"].default  # clicks the service stores per visit
DEFAULT_COUNT: int = Settings.model_fields["default_count"].default
MAX_VISITS = 100_000  # visits kept in this process; the oldest is dropped beyond this

Ranker = Callable[[dict[str, Any], int, int, frozenset[int]], tuple[list[int], list[float]]]


def _onnx_recompute(step: OnnxStep) -> Ranker:
    one = np.zeros(1, dtype=np.int64)  # [1], the item input, refilled per click

    def rank(visit: dict[str, Any], item: int, top_n: int, seen: frozenset[int]) -> tuple[list[int], list[float]]:
        history: list[int] = visit["items"]  # every click so far, this one last
        hidden = step.zero_hidden(1)  # [L, 1, H]
        for i in history[:-1]:
            one[0] = i
            hidden, _, _ = step.run(one, hidden, 1)
        one[0] = item
        _, top, scores = step.run(one, hidden, top_n)  # [1, top_n]
        return top[0].tolist(), scores[0].tolist()

    return rank


def _torch_rankers(checkpoint: Path) -> tuple[Ranker, Ranker]:
    import torch

    from offline.model.gru import load_checkpoint

    torch.set_num_threads(1)  # one core, as ONNX Runtime gets in the service
    model, _ = load_checkpoint(checkpoint)  # eval mode
    zero = model.init_hidden(1)  # [L, 1, H]

    def top_of(f: torch.Tensor, top_n: int) -> tuple[list[int], list[float]]:
        scores = model.score_all(f)[0]  # [n_items]
        best = torch.topk(scores, top_n)
        return best.indices.tolist(), best.values.tolist()

    def eager(visit: dict[str, Any], item: int, top_n: int, seen: frozenset[int]) -> tuple[list[int], list[float]]:
        with torch.no_grad():
            f, visit["hidden"] = model.step(torch.tensor([item]), visit.get("hidden", zero))  # [1, D], [L, 1, H]
            return top_of(f, top_n)

    def recompute(visit: dict[str, Any], item: int, top_n: int, seen: frozenset[int]) -> tuple[list[int], list[float]]:
        with torch.no_grad():
            x = model.embedding(torch.tensor(visit["items"])).unsqueeze(1)  # [T, 1, E]
            out, _ = model.gru(x, zero)  # [T, 1, H]
            f = out[-1]  # [1, H]
            for layer in model.ff:
                f = torch.tanh(layer(f))  # [1, D]
            return top_of(f, top_n)

    return eager, recompute


def create_app(variant: str, artifact_dir: Path, checkpoint: Path | None) -> FastAPI:
    if variant not in VARIANTS:
        raise ValueError(f"variant must be one of {', '.join(VARIANTS)}, got {variant!r}")

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        artifact = load_artifact(artifact_dir)
        if variant == "recompute-onnx":
            ranker = _onnx_recompute(OnnxStep(artifact.step_graph, threads=1))
        else:
            if checkpoint is None:
                raise ValueError(f"{variant} needs --checkpoint")
            eager, recompute = _torch_rankers(checkpoint)
            ranker = eager if variant == "torch-eager" else recompute
        app.state.artifact = artifact
        app.state.ranker = ranker
        app.state.visits = {}
        yield

    app = FastAPI(lifespan=lifespan)
    tag = f"{variant}/{artifact_dir.parent.name}/{artifact_dir.name}"

    @app.post("/v1/sessions/{session_id}/clicks")
    async def click(
        session_id: Annotated[str, PathParam(min_length=1, max_length=SESSION_ID_MAX, pattern=SESSION_ID_PATTERN)],
        body: ClickRequest,
        request: Request,
    ) -> Response:
        started = time.perf_counter()
        state = request.app.state
        index = state.artifact.item_index.get(body.item_id, -1)
        if index < 0:
            message = f"item_id {body.item_id!r} is not in the artifact"
            return Response(json.dumps({"error": "unknown_item", "message": message}), status_code=422, media_type="application/json")
        visits: dict[str, dict[str, Any]] = state.visits
        visit = visits.get(session_id)
        if visit is None:
            if len(visits) >= MAX_VISITS:
                del visits[next(iter(visits))]  # dicts keep insertion order: the oldest visit
            visit = visits[session_id] = {"items": []}
        visit["items"].append(index)
        count = body.count or DEFAULT_COUNT
        # The service leaves out its stored history (history_length clicks before this one) and this click.
        # A request that does not say follows the artifact's serving default, as the service does.
        exclude_seen = state.artifact.exclude_seen if body.exclude_seen is None else body.exclude_seen
        seen = frozenset(visit["items"][-(HISTORY_LENGTH + 1) :]) if exclude_seen else frozenset()
        top_n = min(state.artifact.n_items, count + len(seen))
        items, scores = state.ranker(visit, index, top_n, seen)
        ranking = without_seen(items, scores, seen, count)
        ids = state.artifact.item_ids
        answer = {
            "session_id": session_id,
            "items": [{"item_id": ids[i], "score": s} for i, s in zip(ranking.items, ranking.scores)],
            "served_by": variant,
            "artifact_version": tag,
            "fallback_reason": None,
            "elapsed_ms": round((time.perf_counter() - started) * 1e3, 3),
            "sequence": len(visit["items"]),
            "duplicate": False,
        }
        return Response(json.dumps(answer, separators=(",", ":")), media_type="application/json")

    @app.get("/readyz")
    async def readyz() -> dict[str, bool]:
        return {"ready": True}

    return app


def main(argv: list[str] | None = None) -> int:  # pragma: no cover - runs in its own process
    import uvicorn

    p = argparse.ArgumentParser(prog="python -m bench.naive_serving", description=__doc__.splitlines()[0])
    p.add_argument("--variant", choices=VARIANTS, required=True)
    p.add_argument("--artifact", type=Path, required=True, help="artifact folder <store>/<name>/<version>")
    p.add_argument("--checkpoint", type=Path, help="the same weights as a PyTorch checkpoint (torch variants)")
    p.add_argument("--port", type=int, required=True)
    args = p.parse_args(argv)
    app = create_app(args.variant, args.artifact, args.checkpoint)
    uvicorn.run(app, host="127.0.0.1", port=args.port, loop="uvloop", http="httptools", log_level="warning", access_log=False)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
