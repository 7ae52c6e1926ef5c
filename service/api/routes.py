"""The HTTP routes. Handlers validate (through the schemas), call the visit logic, and answer JSON.

Answers with recommendations are serialised here directly: the response model documents them in
the OpenAPI page, and skipping its per-request re-validation keeps the click path short.
Error answers say what went wrong in the caller's terms, never the internals behind it: no file
system paths (artifact problems are named relative to the model store), no store addresses or
driver messages, no stack traces.
"""

from __future__ import annotations

import asyncio
import logging
import json
import os
import time
from os import PathLike
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Path, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import PlainTextResponse, Response
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from pydantic import ValidationError

from service.api.auth import token_matches
from service.api.deps import Service, ServiceDep
from service.api.errors import ApiError
from service.api.metrics import CONTENT_TYPE
from service.api.schemas import (
    BUDGET_MAX,
    BUDGET_MIN,
    COUNT_MAX,
    COUNT_MIN,
    SESSION_ID_CHARS,
    SESSION_ID_MAX,
    SESSION_ID_PATTERN,
    ClickRequest,
    ErrorAnswer,
    ServingChoiceBody,
    SwitchAnswer,
    ArtifactsAnswer,
    RecommendationAnswer,
)
from service.artifacts.format import list_artifacts
from service.errors import ArtifactError, CairnError, StoreError
from service.runtime.active import LoadedModel, ModelChoice
from service.runtime.timing import Timing
from service.runtime.visits import Answer

router = APIRouter()
log = logging.getLogger("cairn.service")
_NO_STORE = {"cache-control": "no-store"}
_bearer = HTTPBearer(auto_error=False, description="CAIRN_ADMIN_TOKEN")
_ERRORS: dict[int | str, dict[str, Any]] = {code: {"model": ErrorAnswer} for code in (400, 413, 422, 503)}

SessionId = Annotated[
    str,
    Path(
        min_length=1,
        max_length=SESSION_ID_MAX,
        pattern=SESSION_ID_PATTERN,
        description=f"opaque visit id: 1-{SESSION_ID_MAX} {SESSION_ID_CHARS}",
    ),
]


def _timing(request: Request) -> Timing:
    return request.state.timing


def _answer(request: Request, session_id: str, answer: Answer) -> Response:
    # A visit's list is personal: no shared cache on the way may keep it (RFC 9111, section 5.2.2.5).
    note_answer(request.scope["state"], answer)
    body = answer_json(session_id, answer, _timing(request))
    return Response(body, media_type="application/json", headers=_NO_STORE)


def note_answer(state: dict[str, Any], answer: Answer) -> None:
    """Note what answered in the request's state, which the edge middleware records once."""
    state["served_by"] = answer.served_by
    state["fallback_reason"] = answer.fallback_reason
    if answer.arm is not None:
        state["arm"] = answer.arm


def answer_json(session_id: str, answer: Answer, timing: Timing) -> bytes:
    """The JSON of an answer with recommendations (nothing else is read or written)."""
    body = {
        "session_id": session_id,
        "items": [{"item_id": i, "score": s} for i, s in zip(answer.item_ids, answer.scores)],
        "served_by": answer.served_by,
        "artifact": answer.artifact,
        "fallback_reason": answer.fallback_reason,
        "elapsed_ms": round((time.perf_counter() - timing.started) * 1e3, 3),
        "sequence": answer.sequence,
        "duplicate": answer.duplicate,
        "recorded": answer.recorded,
    }
    if answer.arm is not None:  # only while an experiment runs: answers without one stay as they were
        body["arm"] = answer.arm
    return json.dumps(body, separators=(",", ":")).encode()


async def record_click(service: Service, session_id: str, click: ClickRequest, timing: Timing) -> Answer:
    """A validated click, recorded: what `POST /v1/sessions/{session_id}/clicks` does (also from
    the click fast path, service/api/fast_click.py)."""
    settings = service.settings
    answer = await service.visits.click(
        session_id,
        click.item_id,
        click.event_id,
        click.count or settings.default_count,
        click.exclude_seen,
        (click.budget_ms or settings.default_budget_ms) / 1e3,
        timing,
    )
    events = service.events
    if events is not None:
        # A tuple in the order of service/events/event.FIELDS; the writer task makes it JSON.
        events.record((
            time.time(), service.pseudonyms(session_id), answer.sequence, click.item_id, answer.item_ids,
            answer.served_by, answer.fallback_reason, answer.artifact, answer.arm,
            round((time.perf_counter() - timing.started) * 1e3, 3), click.event_id, answer.duplicate,
        ))  # fmt: skip
    return answer


@router.post(
    "/v1/sessions/{session_id}/clicks",
    response_model=RecommendationAnswer,
    responses=_ERRORS,
    summary="Record a click and get the next recommendations",
    tags=["sessions"],
)
async def post_click(session_id: SessionId, click: ClickRequest, request: Request, service: ServiceDep) -> Response:
    # Well-formed clicks are answered by service/api/fast_click.py before they get here; what this
    # route does beyond validation must stay in record_click note_answer and answer_json, which both share.
    return _answer(request, session_id, await record_click(service, session_id, click, _timing(request)))


@router.get(
    "/v1/sessions/{session_id}/recommendations",
    response_model=RecommendationAnswer,
    responses=_ERRORS,
    summary="The visit's current recommendations, without a new click",
    tags=["sessions"],
)
async def get_recommendations(
    session_id: SessionId,
    request: Request,
    service: ServiceDep,
    count: Annotated[int | None, Query(ge=COUNT_MIN, le=COUNT_MAX)] = None,
    exclude_seen: bool | None = None,
    budget_ms: Annotated[int | None, Query(ge=BUDGET_MIN, le=BUDGET_MAX)] = None,
) -> Response:
    settings = service.settings
    answer = await service.visits.current(
        session_id,
        count or settings.default_count,
        exclude_seen,
        (budget_ms or settings.default_budget_ms) / 1e3,
        _timing(request),
    )
    return _answer(request, session_id, answer)


@router.delete(
    "/v1/sessions/{session_id}",
    status_code=204,
    responses=_ERRORS,
    summary="Forget a visit (idempotent)",
    tags=["sessions"],
)
async def delete_session(session_id: SessionId, request: Request, service: ServiceDep) -> Response:
    try:
        await service.visits.forget(session_id, service.settings.default_budget_ms / 1e3, _timing(request))
    except StoreError as exc:
        raise ApiError(503, "store_unavailable", "the session store is unavailable; the visit was not deleted, try again") from exc
    return Response(status_code=204)


def _active_answer(choice: ModelChoice, model: LoadedModel) -> dict[str, Any]:
    return {"name": choice.name, "version": choice.version, "recommender": choice.recommender, "artifact": choice.tag, "scoring": model.scoring,
            "small_batch_rows": model.small_batch_rows or None}  # fmt: skip


@router.get("/v1/artifacts", response_model=ArtifactsAnswer, summary="The artifacts in the folder, and what serves now", tags=["artifacts"])
async def get_artifacts(service: ServiceDep) -> dict[str, Any]:
    model, choice = service.active.current
    listings = await asyncio.to_thread(list_artifacts, service.settings.artifacts)
    artifacts = []
    for a in listings:
        m = a.manifest or {}
        tag = f"{a.name}/{a.version}"
        loaded = service.active.load_results.get(tag, ...) if a.problem is None else ...
        problem = a.problem if a.problem is not None else (loaded if isinstance(loaded, str) else None)
        artifacts.append(
            {
                "name": a.name,
                "version": a.version,
                "verified": a.problem is None,
                "loadable": None if loaded is ... else loaded is None,
                "problem": None if problem is None else _without_paths(problem, service.settings.artifacts),
                "active": (a.name, a.version) == (choice.name, choice.version),
                "created_at": m.get("created_at"),
                "data_fingerprint": m.get("data_fingerprint"),
                "metrics": m.get("metrics") or {},
                "hyperparameters": m.get("hyperparameters") or {},
            }
        )
    return {"active": _active_answer(choice, model), "artifacts": artifacts, "workers": await _workers(service)}


async def _workers(service: Service) -> list[dict[str, Any]]:
    """What every worker sharing this store reported serving at its last poll (this one reports now);
    workers silent for three polls (at least 2 s) are dropped. Empty when the store cannot be read."""
    try:
        await service.active.report()
        reports = await service.store.serving_reports()
        now = time.time()
        stale_after = max(3 * service.settings.model_poll_s, 2.0)
        workers, gone = [], []
        for worker, raw in sorted(reports.items()):
            try:
                r = json.loads(raw)
                age = now - float(r["seen_at"])
                entry = {"worker": worker, "artifact": str(r["artifact"]), "recommender": str(r["recommender"]), "seen_s_ago": round(age, 1)}
            except (ValueError, KeyError, TypeError):
                gone.append(worker)
                continue
            (gone if age > stale_after else workers).append(worker if age > stale_after else entry)
        await service.store.forget_workers(gone)
        return workers
    except StoreError:
        return []


@router.put(
    "/v1/serving",
    response_model=SwitchAnswer,
    response_model_exclude_none=True,  # `arm` only while an experiment runs
    responses={code: {"model": ErrorAnswer} for code in (400, 401, 403, 404, 409, 413, 422, 503)},
    summary="Choose what serves: the artifact (and recommender), at run time",
    tags=["artifacts"],
    openapi_extra={"requestBody": {"required": True, "content": {"application/json": {"schema": ServingChoiceBody.model_json_schema()}}}},
)
async def put_serving(
    request: Request,
    service: ServiceDep,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
) -> dict[str, str]:
    token = service.settings.admin_token
    if token is None:
        raise ApiError(403, "disabled", "model switching is disabled: the service runs without CAIRN_ADMIN_TOKEN")
    if credentials is None or not token_matches(credentials.credentials, token):
        raise ApiError(401, "unauthorized", "a valid bearer token is needed", "authorization", {"WWW-Authenticate": "Bearer"})
    # The body is read only after the token checks out (auth first, then validation).
    try:
        body = ServingChoiceBody.model_validate_json(await request.body())
    except ValidationError as exc:
        raise RequestValidationError([{**e, "loc": ("body", *e["loc"])} for e in exc.errors(include_url=False)]) from None
    active = service.active
    arms = service.visits.arms
    if arms is not None:
        if body.arm is None or body.arm not in arms.models:
            # A well-formed body that does not fit the service's state (RFC 9110, section 15.5.10: 409).
            raise ApiError(409, "arm_conflict", f"an experiment runs: name the arm to switch ({', '.join(arms.models)})", "arm")
        active = arms.models[body.arm]
    elif body.arm is not None:
        raise ApiError(409, "arm_conflict", "no experiment runs: leave out 'arm'", "arm")
    _, current = active.current
    choice = ModelChoice(body.name, body.version, body.recommender or current.recommender)
    try:
        await active.switch(choice)
    except ArtifactError as exc:
        if not (service.settings.artifacts / choice.name / choice.version).is_dir():
            raise ApiError(404, "unknown_artifact", f"no artifact {choice.tag} in the artifacts folder", "version") from exc
        problem = _without_paths(str(exc), service.settings.artifacts)
        raise ApiError(409, "artifact_refused", f"{choice.tag} failed verification, still serving {current.tag}: {problem}") from exc
    except StoreError as exc:
        message = f"the session store is unavailable, so the choice could not be shared; still serving {current.tag}"
        raise ApiError(503, "store_unavailable", message) from exc
    except CairnError as exc:
        raise ApiError(422, "invalid_request", str(exc), "recommender") from exc
    model, switched = active.current
    answer = _active_answer(switched, model)
    if body.arm is not None:
        answer["arm"] = body.arm
    return answer


@router.get("/healthz", summary="The process is alive", tags=["operations"])
async def healthz() -> dict[str, Any]:
    return {"status": "ok", "pid": os.getpid()}


@router.get("/readyz", summary="Model loaded, session store reachable, no circuit breaker open", tags=["operations"])
async def readyz(service: ServiceDep) -> Response:
    """200 when every part works; 503 with `degraded` naming the parts that do not ("model", "store").

    A degraded service still answers every click (from the neighbour table, without the visit);
    503 tells a load balancer or orchestrator to prefer replicas that are whole.
    """
    model_loaded = service.active.ready
    store_ok = True
    try:
        async with asyncio.timeout(service.settings.redis_timeout_s):
            await service.store.ping()
    except (StoreError, TimeoutError):
        store_ok = False
    guards = service.guards
    degraded = guards.degraded() if guards.enabled else []
    if not store_ok and "store" not in degraded:
        degraded.append("store")
    if not model_loaded and "model" not in degraded:
        degraded.insert(0, "model")
    body: dict[str, Any] = {
        "ready": not degraded,
        "degraded": degraded,
        "model": "model" not in degraded,
        "store": "store" not in degraded,
        "breakers": {b.name: b.state.label for b in guards.breakers()} if guards.enabled else {},
        "pid": os.getpid(),
    }
    if model_loaded:
        model, choice = service.active.current
        body["active"] = _active_answer(choice, model)
    return Response(json.dumps(body), status_code=200 if body["ready"] else 503, media_type="application/json")


def _without_paths(message: str, model_store: PathLike) -> str:
    """`message` with the model store's location taken out: artifacts are named as name/version/file."""
    for root in {str(model_store), os.path.abspath(model_store), os.path.realpath(model_store)}:
        message = message.replace(root.rstrip(os.sep) + os.sep, "")
    return message


@router.get(
    "/metrics",
    summary="Prometheus text format 0.0.4",
    tags=["operations"],
    response_class=PlainTextResponse,
    responses={
        200: {"content": {CONTENT_TYPE: {"schema": {"type": "string"}}}, "description": "the service's metrics"},
        503: {"model": ErrorAnswer},
    },
)
async def metrics(service: ServiceDep) -> Response:
    try:
        text = service.metrics.render()
    except (OSError, ValueError, KeyError) as exc:
        # With several workers the scrape reads the others' metric files, which a worker starting or
        # stopping at that moment may leave unreadable for an instant: ask for the next scrape.
        log.warning("metrics could not be read this time: %s", exc)
        raise ApiError(503, "metrics_unavailable", "the metrics could not be read this time; scrape again") from exc
    return Response(text, media_type=CONTENT_TYPE)
