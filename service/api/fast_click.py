"""The click route's fast path: a well-formed click skips FastAPI's routing and dependency solving.

A click is the request a storefront sends on every page view, and FastAPI's per-request machinery
(route matching over every route, solving four parameters, building a Request) costs about as much
as the rest of the click outside the model. This plain ASGI layer sits inside the edge middleware
(which has already buffered the body into the request's state and started its timing) and takes a
`POST /v1/sessions/{session_id}/clicks` only when everything about it is valid:

- the session id follows the documented rule (`schemas.is_session_id`, the rule the route's
  path parameter declares);
- the body is declared JSON and is a JSON object that `schemas.ClickRequest` accepts, validated
  exactly as FastAPI validates it (parsed with `json.loads`, then the model in Python mode).

Then it runs the same `routes.record_click` and writes the same JSON answer (`routes.answer_json`)
as the FastAPI route. Anything else goes to FastAPI untouched, so every error answer, and the
OpenAPI page, still come from one place.
"""

from __future__ import annotations

import json
from typing import Any

from pydantic import ValidationError
from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.routes import answer_json, note_answer, record_click
from service.api.schemas import ClickRequest, is_session_id

CLICK_ROUTE = "/v1/sessions/{session_id}/clicks"
_PREFIX, _SUFFIX = "/v1/sessions/", "/clicks"
_HEADERS_START = [(b"content-type", b"application/json"), (b"cache-control", b"no-store")]


def _declares_json(scope: Scope) -> bool:
    for name, value in scope["headers"]:
        if name == b"content-type":
            # Other JSON types ("+json") are rare from a storefront: they take the long way.
            return value.split(b";", 1)[0].strip().lower() == b"application/json"
    return False


def _parse(body: bytes) -> ClickRequest | None:
    try:
        data = json.loads(body)
    except (ValueError, RecursionError):  # not JSON (JSONDecodeError and UnicodeDecodeError are ValueErrors)
        return None
    if not isinstance(data, dict):
        return None
    try:
        return ClickRequest.model_validate(data)
    except ValidationError:
        return None


class _RouteLabel:
    """Stands in for the route FastAPI would have matched: the edge middleware labels metrics by its path."""

    path = CLICK_ROUTE


_ROUTE = _RouteLabel()


class ClickFastPath:
    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["method"] == "POST":
            path: str = scope["path"]
            session_id = path[len(_PREFIX) : -len(_SUFFIX)] if path.startswith(_PREFIX) and path.endswith(_SUFFIX) else ""
            body = scope["state"].get("body")
            if body is not None and is_session_id(session_id) and _declares_json(scope):
                service = getattr(scope["app"].state, "service", None)
                click = _parse(body)
                if click is not None and service is not None:
                    await self._answer(scope, send, service, session_id, click)
                    return
        # Not taken: FastAPI reads the same buffered body from `receive`, untouched here.
        await self.app(scope, receive, send)

    async def _answer(self, scope: Scope, send: Send, service: Any, session_id: str, click: ClickRequest) -> None:
        scope["route"] = _ROUTE
        state = scope["state"]
        answer = await record_click(service, session_id, click, state["timing"])
        note_answer(state, answer)
        body = answer_json(session_id, answer, state["timing"])
        await send(
            {"type": "http.response.start", "status": 200, "headers": [*_HEADERS_START, (b"content-length", b"%d" % len(body))]}
        )
        await send({"type": "http.response.body", "body": body})
