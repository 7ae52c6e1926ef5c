"""`cairn prepare` end to end through the one CLI entry point."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.cli import main
from offline.data.dataset import PreparedData

T0 = 1_700_000_000  # 2023-11-14T22:13:20Z
DAY = 86_400


def small_log(path: Path) -> Path:
    """Items P1..P3 in train, valid and test sessions, every item clicked at least 5 times.

    Train: sessions 1-4 (day 0). Valid: session 5 (day 2). Test: sessions 6 and 7 (day 3), where
    session 7 is a single click and is dropped in round 1.
    """
    rows = [
        (1, "P1", 0), (1, "P2", 30), (1, "P3", 90),
        (2, "P2", 100), (2, "P1", 130),
        (3, "P3", 200), (3, "P1", 260), (3, "P2", 300),
        (4, "P1", 400), (4, "P3", 460),
        (5, "P2", 2 * DAY), (5, "P3", 2 * DAY + 50),
        (6, "P3", 3 * DAY), (6, "P1", 3 * DAY + 20), (6, "P2", 3 * DAY + 40),
        (7, "P2", 3 * DAY + 100),
    ]
    text = "sid,product,ts\n" + "".join(f"{s},{i},{T0 + t}\n" for s, i, t in rows)
    path.write_text(text, encoding="utf-8")
    return path


def args(log: Path, out: Path, *extra: str) -> list[str]:
    return ["prepare", "--input", str(log), "--out", str(out), "--session-column", "sid",
            "--item-column", "product", "--time-column", "ts", *extra]


def test_prepare_writes_a_loadable_data_set(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = small_log(tmp_path / "clicks.csv")
    out = tmp_path / "prepared"
    assert main(args(log, out)) == 0
    data = PreparedData.load(out)
    # Counted by hand from small_log: train 4 sessions / 10 clicks, valid 1 / 2, test 1 / 3.
    assert data.item_ids == ["P1", "P2", "P3"]
    assert (data.train.n_sessions, data.train.n_clicks) == (4, 10)
    assert (data.valid.n_sessions, data.valid.n_clicks) == (1, 2)
    assert [s.tolist() for s in data.test.sessions()] == [[2, 0, 1]]
    report = json.loads((out / "prepare_report.json").read_text(encoding="utf-8"))
    assert report["steps"][1]["step"] == "drop sessions shorter than 2 (round 1)"
    assert report["steps"][1]["rows_removed"] == 1 and report["fingerprint"] == data.fingerprint()
    printed = capsys.readouterr().out
    assert "drop sessions shorter than 2 (round 1)" in printed and "prepare_report.json" in printed


def test_bad_input_exits_2_with_one_line_and_no_traceback(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = small_log(tmp_path / "clicks.csv")
    out = tmp_path / "prepared"
    bad = args(log, out)
    bad[bad.index("product")] = "item_id"
    assert main(bad) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith("cairn prepare: error: ") and "'item_id'" in err and "'sid', 'product', 'ts'" in err
    assert not out.exists()
    assert main(args(log, out, "--format", "xlsx")) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'xlsx'" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["clicks.csv"]
