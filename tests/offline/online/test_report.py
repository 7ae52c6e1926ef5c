"""`cairn experiment report`: its statistics checked against reference implementations (statsmodels'
Wilson interval, SciPy's chi-square test), its counting on hand-made events, and the command's files."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import chisquare
from statsmodels.stats.proportion import proportion_confint

from offline.online.report import build_report, chi_square, wilson_interval
from service.cli import main as cairn
from service.events.experiment import parse_experiment
from service.events.sinks import FolderSink


@pytest.mark.parametrize("k, n", [(0, 10), (3, 10), (10, 10), (412, 1000), (1, 7), (5123, 20000)])
def test_wilson_interval_matches_statsmodels(k: int, n: int) -> None:
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
    low, high = proportion_confint(k, n, alpha=0.05, method="wilson")
    assert wilson_interval(k, n) == pytest.approx((low, high), abs=1e-12)


@pytest.mark.parametrize(
    "observed, shares",
    [({"a": 5040, "b": 4960}, {"a": 0.5, "b": 0.5}), ({"a": 620, "b": 380}, {"a": 0.5, "b": 0.5}), ({"a": 480, "b": 330, "c": 190}, {"a": 0.5, "b": 0.3, "c": 0.2})],
)
def test_sample_ratio_test_matches_scipy_chisquare(observed: dict, shares: dict) -> None:
    # Reference: scipy.stats.chisquare(f_obs, f_exp), Pearson's chi-square with k - 1 degrees of freedom.
    total = sum(observed.values())
    ref = chisquare([observed[a] for a in shares], [total * s for s in shares.values()])
    mine = chi_square(observed, shares)
    assert mine.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert mine.p_value == pytest.approx(ref.pvalue, rel=1e-9)


def _visit(arm: str, session: str, clicks: list[str], shown: list[list[str]], t0: float = 0.0, fallback: str | None = None) -> list[dict]:
    return [
        {"t": t0 + k, "session_id": session, "sequence": k + 1, "item_id": item, "shown": shown[k], "served_by": "gru",
         "fallback": fallback, "artifact": "x/1", "arm": arm, "elapsed_ms": float(k + 1), "event_id": None, "duplicate": False}
        for k, item in enumerate(clicks)
    ]  # fmt: skip


EXP = {"name": "t", "salt": "salt-of-the-test", "arms": [
    {"name": "a", "artifact": "x/1", "recommender": "gru", "share": 0.5},
    {"name": "b", "artifact": "x/2", "recommender": "popularity", "share": 0.5},
]}  # fmt: skip


def test_hit_rate_and_click_through_by_position_count_by_hand() -> None:
    events = _visit("a", "v1", ["1", "2", "3"], [["2", "9"], ["7", "3"], ["5"]])  # hits at rank 1 then rank 2
    events += _visit("a", "v2", ["4", "8"], [["5", "6"], []])  # a miss
    events += _visit("b", "v3", ["1", "2"], [["9", "8"], ["1"]], fallback="budget")  # a miss
    dup = dict(events[0], duplicate=True)
    report = build_report(events + [dup], parse_experiment(EXP), bootstrap=200)
    a, b = report.arms
    assert (a.visits, a.clicks, a.opportunities, a.hits) == (2, 5, 3, 2)
    assert a.ctr_by_position == [pytest.approx(1 / 3), pytest.approx(1 / 3)]
    assert (b.visits, b.hits, b.fallback_share) == (1, 0, 1.0)
    assert a.latency_p50_ms == 2.0


def test_a_clear_difference_has_a_ci_excluding_zero_and_srm_passes() -> None:
    rng = np.random.default_rng(1)
    events = []
    for v in range(2000):
        arm = "a" if v % 2 == 0 else "b"
        p = 0.2 if arm == "a" else 0.3
        clicks = [str(i) for i in range(int(rng.integers(2, 6)))]
        shown = [[clicks[k + 1]] if k + 1 < len(clicks) and rng.random() < p else ["x"] for k in range(len(clicks))]
        events += _visit(arm, f"v{v}", clicks, shown)
    report = build_report(events, parse_experiment(EXP), bootstrap=500)
    (d,) = report.differences
    assert d.ci[0] > 0 and d.verdict.startswith("b wins")
    assert not report.sample_ratio.mismatch


def test_a_sample_ratio_mismatch_is_loud(tmp_path: Path, capsys) -> None:
    events = []
    for v in range(1000):
        events += _visit("a" if v < 600 else "b", f"v{v}", ["1", "2"], [["2"], ["1"]], t0=1e9)
    sink = FolderSink(tmp_path / "events", max_bytes=1 << 30)
    asyncio.run(sink.write([json.dumps(e).encode() for e in events]))
    asyncio.run(sink.close())
    (tmp_path / "exp.json").write_text(json.dumps(EXP), encoding="utf-8")
    code = cairn(["experiment", "report", "--events", str(tmp_path / "events"), "--out", str(tmp_path / "report"),
                  "--experiment", str(tmp_path / "exp.json"), "--bootstrap", "200"])  # fmt: skip
    assert code == 1
    out = capsys.readouterr().out
    assert "**SAMPLE RATIO MISMATCH" in out
    saved = json.loads((tmp_path / "report" / "experiment.json").read_text())
    assert saved["sample_ratio"]["mismatch"] is True and saved["verdict"][0].startswith("SAMPLE RATIO MISMATCH")
    assert (tmp_path / "report" / "experiment.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "report" / "experiment.md").exists()


def test_report_errors_are_one_line(tmp_path: Path, capsys) -> None:
    assert cairn(["experiment", "report", "--events", str(tmp_path / "none"), "--out", str(tmp_path / "r")]) == 2
    assert "no such folder" in capsys.readouterr().err


def test_the_readme_experiment_declaration_reads(tmp_path: Path) -> None:
    import re

    from service.events.experiment import load_experiment

    readme = (Path(__file__).resolve().parents[3] / "README.md").read_text(encoding="utf-8")
    block = re.search(r"`CAIRN_EXPERIMENT=experiment.toml`:\n\n```\n(.*?)```", readme, re.S).group(1)
    (tmp_path / "experiment.toml").write_text(block, encoding="utf-8")
    exp = load_experiment(tmp_path / "experiment.toml")
    assert [a.name for a in exp.arms] == ["neighbours", "gru"] and exp.shares() == {"neighbours": 0.5, "gru": 0.5}


def test_export_refuses_an_unknown_format_before_reading(tmp_path: Path, capsys) -> None:
    assert cairn(["events", "export", "--from", str(tmp_path / "none"), "--out", str(tmp_path / "clicks.txt")]) == 2
    assert "--out" in capsys.readouterr().err
