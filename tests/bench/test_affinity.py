"""Benchmarks that tests run in-process hand back the cores they pinned themselves to: a test after
them must see every core (a benchmark needs two; one left behind broke the next test's run)."""

from __future__ import annotations

import os
from pathlib import Path

from bench.events import main as events_main


def test_a_benchmark_run_leaves_the_process_on_its_cores(tmp_path: Path) -> None:
    before = os.sched_getaffinity(0)
    events_main(["--out", str(tmp_path / "events.json"), "--rounds", "1", "--round-seconds", "0.5", "--rate", "100", "--items", "200", "--hidden", "8"])
    assert os.sched_getaffinity(0) == before
