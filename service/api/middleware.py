"""The HTTP edge, one plain ASGI middleware (no per-request task or response copy):

- refuses a body over 16 KB with 413 before anything parses it (by Content-Length, and by counting
  when the length is not announced);
- adds `Server-Timing` to every response (W3C Server Timing, https://www.w3.org/TR/server-timing/:
  `name;dur=milliseconds`, entries separated by commas): store calls, the model as the request saw
  it, of that the ONNX Runtime call that scored the click (`step`), and the total;
- records the request's metrics once, after it is answered (among them which scoring path the
  GRU took: `cairn_gru_scoring_total{scoring="int8"}`);
- is the last resort: an exception from inside becomes a plain 500 without internals, and the log
  gets its type and stack, never its message (which could quote session contents).
"""

from __future__ import annotations

import asyncio
import json
import logging
import time
import traceback
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.metrics import ServiceMetrics
from service.runtime.timing import Timing

log = logging.getLogger("cairn.service")

MAX_BODY_BYTES = 16 * 1024
_BODY_METHODS = frozenset({"POST", "PUT", "PATCH"})


def server_timing(timing: Timing, total_s: float) -> bytes:
    return (
        f"store;dur={timing.store_s * 1e3:.2f}, model;dur={timing.model_s * 1e3:.2f}, "
        f"step;dur={timing.step_s * 1e3:.2f}, total;dur={total_s * 1e3:.2f}"
    ).encode()


def error_body(status: int, error: str, message: str, field: str | None = None) -> bytes:
    return json.dumps({"error": error, "message": message, "field": field, "status": status}).encode()


async def send_json_error(send: Send, status: int, error: str, message: str, field: str | None = None) -> None:
    body = error_body(status, error, message, field)
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode())],
        }
    )
    await send({"type": "http.response.body", "body": body})


class EdgeMiddleware:
    def __init__(
        self, app: ASGIApp, metrics: ServiceMetrics, store_kind: str, max_body: int = MAX_BODY_BYTES, body_timeout_s: float = 5.0
    ) -> None:
        self.app = app
        self.metrics = metrics
        self.store_kind = store_kind
        self.max_body = max_body
        self.body_timeout_s = body_timeout_s  # a client that sends half a body is not held longer than this

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        timing = Timing()
        scope.setdefault("state", {})["timing"] = timing
        response: dict[str, Any] = {"status": 500, "started": False}

        async def send_timed(message: Message) -> None:
            if message["type"] == "http.response.start":
                response["status"] = message["status"]
                response["started"] = True
                headers = [*message.get("headers", ()), (b"server-timing", server_timing(timing, time.perf_counter() - timing.started))]
                message = {**message, "headers": headers}
            await send(message)

        try:
            inner_receive = receive
            if scope["method"] in _BODY_METHODS:
                inner_receive = await self._buffer_body(scope, receive, send_timed)
            if inner_receive is not None:
                await self.app(scope, inner_receive, send_timed)
        except Exception as exc:  # noqa: BLE001 - the last resort: nothing escapes as a traceback to the client
            log.error("unhandled %s:\n%s", type(exc).__name__, "".join(traceback.format_tb(exc.__traceback__)))
            if not response["started"]:
                await send_json_error(send_timed, 500, "internal_error", "the service failed to answer this request")
        finally:
            self._record(scope, response["status"], timing)

    async def _buffer_body(self, scope: Scope, receive: Receive, send: Send) -> Receive | None:
        """Read the whole (small) body first; None when the request was answered here instead."""
        declared = None
        for name, value in scope.get("headers", ()):
            if name == b"content-length":
                try:
                    declared = int(value)
                except ValueError:
                    await send_json_error(send, 400, "bad_request", "Content-Length is not a number", "content-length")
                    return None
        if declared is not None and declared > self.max_body:
            await self._too_large(send)
            return None
        chunks: list[bytes] = []
        size = 0
        try:
            async with asyncio.timeout(self.body_timeout_s):
                while True:
                    message = await receive()
                    if message["type"] == "http.disconnect":
                        return None
                    chunk = message.get("body", b"")
                    size += len(chunk)
                    if size > self.max_body:
                        await self._too_large(send)
                        return None
                    chunks.append(chunk)
                    if not message.get("more_body", False):
                        break
        except TimeoutError:
            # RFC 9110, section 15.5.9: 408 when the client did not send a complete request in time;
            # uvicorn closes the connection after this answer, as the body was not read to its end.
            await send_json_error(send, 408, "body_timeout", f"request body not received within {self.body_timeout_s:g} s", "body")
            return None
        body = b"".join(chunks)
        scope["state"]["body"] = body  # the click fast path reads it here, without a second receive
        replayed = False

        async def replay() -> Message:
            nonlocal replayed
            if not replayed:
                replayed = True
                return {"type": "http.request", "body": body, "more_body": False}
            return await receive()  # after the body: wait for a disconnect, as the server would say

        return replay

    async def _too_large(self, send: Send) -> None:
        await send_json_error(send, 413, "body_too_large", f"request body over {self.max_body} bytes", "body")

    def _record(self, scope: Scope, status: int, timing: Timing) -> None:
        m = self.metrics
        total = time.perf_counter() - timing.started
        route = getattr(scope.get("route"), "path", None) or "unmatched"  # templates only: bounded label values
        method = scope["method"]
        m.request_duration.observe((route, method), total)
        m.requests.inc((route, method, str(status)))
        state = scope.get("state", {})
        served_by = state.get("served_by")
        if served_by is not None:
            m.answer_duration.observe((served_by,), total)
            if timing.model_s > 0:
                m.model_duration.observe((served_by,), timing.model_s)
            if timing.scoring:
                m.gru_scoring.inc((timing.scoring,))
            reason = state.get("fallback_reason")
            if reason is not None:
                m.fallbacks.inc((reason,))
            arm = state.get("arm")
            if arm is not None:
                m.arm_duration.observe((arm, served_by), total)
                if reason is not None:
                    m.arm_fallbacks.inc((arm, reason))
        if timing.store_s > 0:
            m.store_duration.observe((self.store_kind,), timing.store_s)
