"""FastAPI's own OpenTelemetry hook stays off: cairn reports through Prometheus, and the hook's
per-request provider lookup costs a click CPU for nothing."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.api import app as app_module
from service.api.app import create_app
from service.config import Settings


def test_no_opentelemetry_provider_is_looked_up_per_request(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    app = create_app(Settings(recommender="popularity", artifacts=tmp_path))
    telemetry = getattr(app, "_native_telemetry", None)
    if telemetry is None:  # a FastAPI without the hook: nothing to turn off, and nothing was passed
        assert app_module._NO_OPENTELEMETRY == {}
        return
    from opentelemetry import metrics, trace

    looked_up: list[str] = []
    monkeypatch.setattr(trace, "get_tracer_provider", lambda: looked_up.append("tracer"))
    monkeypatch.setattr(metrics, "get_meter_provider", lambda: looked_up.append("meter"))
    # What FastAPI.__call__ asks on every HTTP request before it takes the instrumented way.
    assert telemetry.enabled() is False
    assert looked_up == []
