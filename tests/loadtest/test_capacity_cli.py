"""`cairn capacity` at tiny scale: a three-step ramp against the service started here."""

from __future__ import annotations

import json
import math
from pathlib import Path

from service.cli import main


def test_capacity_reports_a_positive_rate_per_core(tmp_path: Path, model_store: Path, visits_data: Path, capsys) -> None:
    report_dir = tmp_path / "capacity"
    rc = main([
        "capacity", "--serve", "--recommender", "popularity", "--session-store", "memory", "--artifacts", str(model_store),
        "--data", str(visits_data), "--ramp", "20:60:20", "--step-duration", "1", "--users", "4",
        "--p99-budget-ms", "25", "--target-rate", "500", "--report", str(report_dir),
    ])  # fmt: skip
    out = capsys.readouterr().out
    assert rc == 0, out
    # Each step's line comes when it ends: the first ones before Locust has finished (the summary).
    lines = out.splitlines()
    step_lines = [n for n, line in enumerate(lines) if line.startswith("step ") and "/3 (" in line]
    assert len(step_lines) == 3 and step_lines[-1] < lines.index("summary:"), out
    assert (report_dir / "capacity.png").stat().st_size > 1000
    r = json.loads((report_dir / "capacity.json").read_text(encoding="utf-8"))
    assert r["kind"] == "cairn-capacity/1"
    assert [s["target_rps"] for s in r["steps"]] == [20.0, 40.0, 60.0]
    c = r["capacity"]
    assert c["found"] and c["rate_rps"] > 0
    # The rate is what the highest step of the unbroken run from the bottom achieved.
    held = 0
    while held < len(r["steps"]) and r["steps"][held]["meets_budget"]:
        held += 1
    assert c["rate_rps"] == r["steps"][held - 1]["rps"]
    assert c["ramp_exhausted"] == (held == len(r["steps"]))
    # One service worker: one core; sizing for 500/s at 70% of the measured rate.
    assert c["service_cores"] == 1.0 and c["per_core_rps"] == c["rate_rps"]
    assert c["cores_needed"] == math.ceil(500 / (c["per_core_rps"] * 0.7))
    assert c["cores_needed_at_full"] == math.ceil(500 / c["per_core_rps"])
    assert c["replicas_needed"] == c["cores_needed"]
    assert "this machine" in c["caveat"]
    md = (report_dir / "capacity.md").read_text(encoding="utf-8")
    assert "requests/s per service core" in md and "Caveat: measured on this machine" in md
    assert "capacity:" in out


def test_capacity_with_a_url_needs_the_service_cores(visits_data: Path, capsys) -> None:
    rc = main(["capacity", "--url", "http://127.0.0.1:9", "--data", str(visits_data), "--ramp", "10:20:10"])
    err = capsys.readouterr().err
    assert rc == 2 and "--service-cores" in err
