"""bench.training at toy sizes: it measures, it does not judge here."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from bench import training as bench

TOY = ["--sessions", "3000", "--threads", "1", "--negatives", "32", "--hidden-size", "8", "--warmup", "1", "--steps", "3",
       "--windows", "2"]


def test_reports_speed_and_memory_per_catalogue_size_beside_the_plain_step(tmp_path: Path) -> None:
    out = tmp_path / "training.json"
    assert bench.main(["--out", str(out), "--items", "500,3000", "--batch-sizes", "8", "--compare-plain", *TOY]) == 0
    rows = json.loads(out.read_text())["results"]
    assert [(r["items"], r["step"]) for r in rows] == [(500, "optimised"), (500, "plain"), (3000, "optimised"), (3000, "plain")]
    for r in rows:
        assert r["median_clicks_per_second"] > 0 and len(r["window_clicks_per_second"]) == 2
        assert r["peak_rss_bytes"] > 10 * 2**20  # a process with torch loaded: tens of MB at least
        assert r["ratio_to_plain"] > 0
    assert rows[1]["ratio_to_plain"] == 1.0


def test_each_batch_size_is_a_row(tmp_path: Path) -> None:
    out = tmp_path / "training.json"
    assert bench.main(["--out", str(out), "--items", "500", "--batch-sizes", "8,16", *TOY]) == 0
    report = json.loads(out.read_text())
    assert [r["batch_size"] for r in report["results"]] == [8, 16]
    assert all(r["ratio_to_plain"] is None for r in report["results"])


@pytest.mark.parametrize("flag, value", [("--items", "40k"), ("--items", "0"), ("--batch-sizes", "8,-1")])
def test_bad_sizes_are_named(flag: str, value: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        bench.main([flag, value])
    assert stop.value.code == 2
    assert value in capsys.readouterr().err
