"""`cairn loadtest` end to end: the real service (`cairn serve` subprocess), real Locust master and
worker processes, a few seconds of load each."""

from __future__ import annotations

import json
import socket
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from service.cli import main
from bench.harness.service_process import LocalService, ServiceSpec

STEP_FIELDS = {
    "index", "target_rps", "window_s", "requests", "rps", "latency_ms", "error_rate", "errors", "served_by",
    "fallback_reason", "hit_rate", "hits", "hit_events", "visits_started", "visits_completed",
    "generator_cpu_percent", "meets_budget", "failures", "notes",
}  # fmt: skip
REPORT_FIELDS = {
    "kind", "started_at", "wall_s", "target", "settings", "visits", "budget", "verdict", "overall", "steps",
    "load_generator", "locust",
}  # fmt: skip


def _port_open(url: str) -> bool:
    parts = urlsplit(url)
    with socket.socket() as s:
        s.settimeout(0.5)
        return s.connect_ex((parts.hostname, parts.port)) == 0


def test_serve_meets_a_generous_budget_and_writes_the_report(tmp_path: Path, model_store: Path, visits_data: Path, capsys) -> None:
    report_dir = tmp_path / "report"
    rc = main([
        "loadtest", "--serve", "--recommender", "gru", "--session-store", "memory", "--artifacts", str(model_store),
        "--data", str(visits_data), "--users", "4", "--rate", "40", "--duration", "3",
        "--count", "5", "--budget-ms", "50", "--p99-budget-ms", "25", "--max-error-rate", "0",
        "--report", str(report_dir),
    ])  # fmt: skip
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "budget met" in out
    # Said as it went: the warm-up, then the step's line when it ended, before the summary.
    assert out.index("warm-up: ") < out.index("step 1/1 (40/s): ") < out.index("summary:")
    png = report_dir / "loadtest.png"
    import matplotlib.image

    assert matplotlib.image.imread(str(png)).shape[2] in (3, 4)  # a picture that decodes
    assert "![p99 and fallbacks by rate](loadtest.png)" in (report_dir / "loadtest.md").read_text(encoding="utf-8")

    r = json.loads((report_dir / "loadtest.json").read_text(encoding="utf-8"))
    md = (report_dir / "loadtest.md").read_text(encoding="utf-8")
    assert set(r) == REPORT_FIELDS
    assert r["kind"] == "cairn-loadtest/1"
    assert r["verdict"] == {"met": True, "reasons": []}
    assert r["settings"]["mode"] == "rate" and r["settings"]["step_rates"] == [40.0]
    assert r["target"]["served_here"] and r["target"]["service"]["recommender"] == "gru"
    [step] = r["steps"]
    assert set(step) == STEP_FIELDS
    assert set(step["latency_ms"]) == {"p50", "p95", "p99", "max", "mean"}
    lat = step["latency_ms"]
    assert 0 < lat["p50"] <= lat["p95"] <= lat["p99"] <= lat["max"]
    assert lat["p99"] <= 25
    assert step["meets_budget"] and step["failures"] == []
    assert step["error_rate"] == 0 and step["errors"] == {}
    assert step["served_by"] == {"gru": 1.0} and step["fallback_reason"] == {"none": 1.0}
    # The pacing reached the target: 40 requests/s for 3 s.
    assert 36 <= step["rps"] <= 44 and 108 <= step["requests"] <= 132
    assert step["hit_events"] > 0 and 0 <= step["hit_rate"] <= 1
    # Locust's own statistics count the same click requests as the visitors' own records.
    assert r["locust"] == {"requests": step["requests"], "failures": 0}
    assert r["overall"]["requests"] == step["requests"]
    assert r["load_generator"]["workers"] >= 1
    for text in ("# cairn load test: budget met", "| step | target rps | achieved rps", "## Load generator", "gru 100.0%"):
        assert text in md
    # The service it started is stopped again.
    assert r["target"]["url"].startswith("http://127.0.0.1:")
    assert not _port_open(r["target"]["url"])


def test_an_impossible_budget_exits_1(tmp_path: Path, model_store: Path, visits_data: Path, capsys) -> None:
    spec = ServiceSpec(recommender="popularity", session_store="memory", artifacts=model_store)
    report_dir = tmp_path / "report"
    with LocalService(spec, tmp_path / "service.log") as service:
        rc = main([
            "loadtest", "--url", service.url, "--data", str(visits_data), "--users", "2", "--load-workers", "1",
            "--duration", "2", "--think-scale", "0.05", "--p99-budget-ms", "0.001", "--report", str(report_dir),
        ])  # fmt: skip
    out = capsys.readouterr().out
    assert rc == 1, out
    assert "budget NOT met" in out
    r = json.loads((report_dir / "loadtest.json").read_text(encoding="utf-8"))
    assert r["settings"]["mode"] == "think-time" and r["target"]["url"] == service.url
    assert r["verdict"]["met"] is False
    assert any("p99" in reason and "0.001 ms" in reason for reason in r["verdict"]["reasons"])
    [step] = r["steps"]
    assert step["requests"] > 0 and step["error_rate"] == 0 and not step["meets_budget"]
    # Think times were kept: the fixture's gaps average 2 s, 0.1 s scaled, so 2 visitors send far
    # fewer clicks in 2 s than without waiting (thousands here).
    assert step["requests"] < 200
    assert step["served_by"] == {"popularity": 1.0}
    assert "# cairn load test: budget NOT met" in (report_dir / "loadtest.md").read_text(encoding="utf-8")


@pytest.mark.parametrize(
    "args, named",
    [
        (["--url", "http://127.0.0.1:9", "--serve"], "--url and --serve"),
        (["--url", "http://127.0.0.1:9/v1"], "'http://127.0.0.1:9/v1'"),
        (["--url", "ftp://127.0.0.1:9"], "'ftp://127.0.0.1:9'"),
        (["--url", "http://127.0.0.1:9", "--recommender", "gru"], "--recommender"),
        (["--url", "http://127.0.0.1:9", "--ramp", "50:10:10"], "'50:10:10'"),
        (["--url", "http://127.0.0.1:9", "--ramp", "10:50"], "'10:50'"),
        (["--url", "http://127.0.0.1:9", "--ramp", "10:50:10", "--rate", "5"], "--rate and --ramp"),
        (["--url", "http://127.0.0.1:9", "--users", "2", "--load-workers", "3"], "--load-workers 3"),
        (["--url", "http://127.0.0.1:9", "--think-scale", "-1"], "-1"),
        (["--url", "http://127.0.0.1:9", "--max-error-rate", "2"], "2"),
        (["--serve", "--artifacts", "/nonexistent/store"], "/nonexistent/store"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(args: list[str], named: str, visits_data: Path, capsys) -> None:
    rc = main(["loadtest", "--data", str(visits_data), *args])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert err.startswith("cairn loadtest: error:") and "\n" not in err
    assert named in err


def test_a_url_where_nothing_answers_fails_at_once(visits_data: Path, capsys) -> None:
    import time

    from bench.harness.ports import free_port

    started = time.monotonic()
    rc = main(["loadtest", "--url", f"http://127.0.0.1:{free_port()}", "--data", str(visits_data), "--duration", "30"])
    err = capsys.readouterr().err
    assert rc == 2 and "no service answers there" in err and "\n" == err[-1] and err.count("\n") == 1
    assert time.monotonic() - started < 10  # not a 30 s run against a closed port


def test_missing_data_names_the_folder(tmp_path: Path, capsys) -> None:
    rc = main(["loadtest", "--url", "http://127.0.0.1:9", "--data", str(tmp_path / "nowhere")])
    err = capsys.readouterr().err
    assert rc == 2 and str(tmp_path / "nowhere") in err
