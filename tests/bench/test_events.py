"""bench/events.py in a tiny run: both servers answer, no event is dropped, and every answered click
of the events server is in its folder (the speed figures themselves are the benchmark's, not a test's)."""

from __future__ import annotations

import json
from pathlib import Path

from bench.events import main


def test_tiny_run_writes_every_event_and_reports_both_variants(tmp_path: Path, capsys) -> None:
    out = tmp_path / "events.json"
    assert main(["--out", str(out), "--rounds", "1", "--round-seconds", "1", "--rate", "200", "--items", "200", "--hidden", "8"]) == 0
    report = json.loads(out.read_text())
    assert set(report["summary"]) == {"off", "on"}
    assert report["summary"]["on"]["errors"] == report["summary"]["off"]["errors"] == 0
    assert report["events_dropped"] == 0
    assert report["events_in_folder"] == report["clicks_answered_with_events"] > 50  # a loaded machine sends fewer
    assert "p99 with events / without" in capsys.readouterr().out
