"""The pages' routes: the demo shop (/shop/), the operator view (/operator/), and what they read
beyond the public API (item names, the windowed summary, the latest report files).

Pages are rendered by Jinja2 with autoescaping on, so every value from an artifact or a request
arrives as text, and carry a Content-Security-Policy that allows scripts, styles and requests from
this origin only: no inline script or style, no framing (CSP Level 3, W3C). Their one script,
static/pages.js, calls the same public routes a storefront backend calls and writes what it gets
with textContent only.
"""

from __future__ import annotations

import asyncio
import json
import os
from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, FastAPI, Query, Request
from fastapi.responses import FileResponse, HTMLResponse, Response
from fastapi.staticfiles import StaticFiles
from jinja2 import Environment, FileSystemLoader

from service.api.deps import ServiceDep
from service.api.errors import ApiError
from service.api.metrics import ServiceMetrics
from service.api.pages.catalogue import CatalogueCache
from service.api.pages.summary import OperatorSummary

_HERE = Path(__file__).parent
STATIC_PREFIX = "/pages/static"
CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
    "form-action 'self'; base-uri 'none'; frame-ancestors 'none'"
)
_PAGE_HEADERS = {
    "content-security-policy": CONTENT_SECURITY_POLICY,
    "x-content-type-options": "nosniff",
    "referrer-policy": "no-referrer",
    "cache-control": "no-store",
}
NAMES_MAX = 100  # ids one names request may ask about: an answer's list and more
QUERY_MAX = 100
# The latest reports the operator view links to, relative to the service's working folder, as the
# commands that write them name them by default: key -> (path, media type).
REPORTS = {
    "loadtest": (Path("reports/loadtest/loadtest.md"), "text/markdown; charset=utf-8"),
    "capacity": (Path("reports/capacity/capacity.md"), "text/markdown; charset=utf-8"),
    "evaluation": (Path("reports/demo/evaluation.json"), "application/json"),
    "quality": (Path("reports/demo/quality.json"), "application/json"),
}


def install_pages(app: FastAPI, metrics: ServiceMetrics) -> None:
    """Add the pages and their static files to `app` (only when CAIRN_PAGES is on)."""
    templates = Environment(loader=FileSystemLoader(_HERE / "templates"), autoescape=True)
    catalogue = CatalogueCache()
    summary = OperatorSummary(metrics)
    router = APIRouter(include_in_schema=False)

    def render(name: str, **values: Any) -> HTMLResponse:
        html = templates.get_template(name).render(static=STATIC_PREFIX, **values)
        return HTMLResponse(html, headers=_PAGE_HEADERS)

    @router.get("/shop/")
    async def shop(service: ServiceDep, q: Annotated[str, Query(max_length=QUERY_MAX)] = "") -> HTMLResponse:
        model, choice = service.active.current
        # Sorting and searching a large catalogue takes milliseconds: off the event loop that answers clicks.
        shop = await asyncio.to_thread(catalogue.of, model.artifact)
        items = await asyncio.to_thread(shop.page, q)
        return render(
            "shop.html", items=items, query=q, artifact=choice.tag, named=bool(shop.names),
            n_items=len(shop.items), default_budget_ms=service.settings.default_budget_ms,
        )  # fmt: skip

    @router.get("/shop/names")
    async def names(service: ServiceDep, ids: Annotated[list[str] | None, Query(alias="id")] = None) -> dict[str, dict[str, str]]:
        ids = ids or []
        if len(ids) > NAMES_MAX:
            raise ApiError(422, "invalid_request", f"at most {NAMES_MAX} ids a request, got {len(ids)}", "id")
        known = service.active.current[0].artifact.item_names
        return {"names": {i: known[i] for i in ids if i in known}}

    @router.get("/operator/")
    async def operator(service: ServiceDep) -> HTMLResponse:
        _, choice = service.active.current
        settings = service.settings
        reports = [(key, str(path)) for key, (path, _) in REPORTS.items() if path.is_file()]
        return render(
            "operator.html", choice=choice, budget_ms=settings.default_budget_ms, store_kind=settings.store_kind,
            guards=service.guards.enabled, switching=settings.admin_token is not None, reports=reports, pid=os.getpid(),
            window_s=int(summary.window_s),
        )  # fmt: skip

    @router.get("/operator/summary.json")
    async def operator_summary(service: ServiceDep) -> Response:
        _, choice = service.active.current
        body = {**summary.summary(), "budget_ms": service.settings.default_budget_ms, "artifact": choice.tag, "pid": os.getpid()}
        return Response(_json(body), media_type="application/json", headers={"cache-control": "no-store"})

    @router.get("/operator/reports/{key}")
    async def report(key: str) -> FileResponse:
        found = REPORTS.get(key)
        if found is None or not found[0].is_file():
            raise ApiError(404, "no_report", f"no {key!r} report here; known: {', '.join(REPORTS)}", "key")
        path, media_type = found
        return FileResponse(path, media_type=media_type, headers={"x-content-type-options": "nosniff", "cache-control": "no-store"})

    app.include_router(router)
    app.mount(STATIC_PREFIX, StaticFiles(directory=_HERE / "static"), name="pages-static")


def _json(body: dict[str, Any]) -> bytes:
    return json.dumps(body, separators=(",", ":")).encode()
