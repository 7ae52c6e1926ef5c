"""The click fast path (service/api/fast_click.py) answers exactly as the FastAPI route would, and
hands everything it does not fully accept to FastAPI untouched."""

from __future__ import annotations

import asyncio
import json
import re

import pytest

from service.api.fast_click import ClickFastPath

CLICKS = ["sku-000011", "sku-000222", "sku-000333", "sku-000011"]


def _comparable(answer: dict) -> dict:
    return {k: v for k, v in answer.items() if k not in ("session_id", "elapsed_ms")}


def test_fast_and_framework_paths_give_the_same_answers(server, sid):
    fast, slow = sid("fast"), sid("slow")
    with server.client() as c:
        for n, item in enumerate(CLICKS):
            # A budget no loaded machine runs past: both answers must come from the model to compare.
            body = {"item_id": item, "count": 4, "event_id": f"e-{n}", "budget_ms": 5000}
            a = c.post(f"/v1/sessions/{fast}/clicks", json=body)  # Content-Type: application/json: the fast path
            # A structured-syntax JSON type (RFC 6839, "+json"): FastAPI reads it as JSON, the fast path leaves it alone.
            b = c.post(
                f"/v1/sessions/{slow}/clicks", content=json.dumps(body).encode(), headers={"content-type": "application/vnd.shop+json"}
            )
            assert a.status_code == b.status_code == 200
            assert _comparable(a.json()) == _comparable(b.json())
            assert a.json()["session_id"] == fast and b.json()["session_id"] == slow
            for header in ("content-type", "cache-control"):
                assert a.headers[header] == b.headers[header]
            assert {e.split(";")[0].strip() for e in a.headers["server-timing"].split(",")} == {"store", "model", "step", "total"}
        again = c.post(f"/v1/sessions/{fast}/clicks", json={"item_id": "sku-000999", "event_id": "e-0"}).json()
        metrics = c.get("/metrics").text
    assert again["duplicate"] is True and again["sequence"] == len(CLICKS)
    # Both paths are counted under the click route's template.
    counted = re.search(r'cairn_http_requests_total\{method="POST",route="/v1/sessions/\{session_id\}/clicks",status="200"\} ([\d.]+)', metrics)
    assert counted and float(counted.group(1)) >= 2 * len(CLICKS) + 1


class Recorder:
    """The inner app: records what reached it and the body it could read."""

    def __init__(self) -> None:
        self.bodies: list[bytes] = []

    async def __call__(self, scope, receive, send) -> None:
        message = await receive()
        self.bodies.append(message.get("body", b""))
        await send({"type": "http.response.start", "status": 299, "headers": []})
        await send({"type": "http.response.body", "body": b""})


class NoService:
    class state:  # noqa: N801 - stands in for app.state before the service is ready
        pass


def _call(path: str, body: bytes, content_type: bytes | None = b"application/json") -> tuple[list[bytes], list[dict]]:
    inner = Recorder()
    layer = ClickFastPath(inner)
    headers = [(b"content-type", content_type)] if content_type is not None else []
    scope = {"type": "http", "method": "POST", "path": path, "headers": headers, "app": NoService, "state": {}}
    sent: list[dict] = []

    async def receive():
        return {"type": "http.request", "body": body, "more_body": False}

    async def send(message):
        sent.append(message)

    asyncio.run(layer(scope, receive, send))
    return inner.bodies, sent


@pytest.mark.parametrize(
    "path, body, content_type",
    [
        ("/v1/sessions/" + "a" * 129 + "/clicks", b'{"item_id": "x"}', b"application/json"),  # id too long
        ("/v1/sessions/bad id/clicks", b'{"item_id": "x"}', b"application/json"),  # a space: outside the safe set
        ("/v1/sessions/ok/clicks", b'{"item_id": "x"}', b"text/plain"),  # not declared JSON
        ("/v1/sessions/ok/clicks", b'{"item_id": "x"}', b"application/vnd.shop+json"),  # JSON, but not plain application/json
        ("/v1/sessions/ok/clicks", b'{"item_id": "x"}', None),
        ("/v1/sessions/ok/clicks", b'{"item_id": "x",}', b"application/json"),  # malformed JSON
        ("/v1/sessions/ok/clicks", b'["x"]', b"application/json"),  # not an object
        ("/v1/sessions/ok/clicks", b'{"item_id": "x", "count": 0}', b"application/json"),  # count out of range
        ("/v1/sessions/ok/clicks", b'{"item": "x"}', b"application/json"),  # unknown field, item_id missing
        ("/v1/sessions/ok/clicks", b"\xff\xfe", b"application/json"),  # not UTF-8
        ("/v1/sessions/ok/clicks/", b'{"item_id": "x"}', b"application/json"),  # another route
        ("/v1/sessions/ok/clicks", b'{"item_id": "x"}', b"application/json"),  # valid, but the service is not ready
    ],
)
def test_what_the_fast_path_does_not_take_reaches_fastapi_with_its_body(path, body, content_type):
    bodies, sent = _call(path, body, content_type)
    assert bodies == [body]  # the inner app got the request, body intact
    assert sent[0]["status"] == 299
