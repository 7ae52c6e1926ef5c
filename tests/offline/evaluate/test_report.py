"""`cairn evaluate --tune --exclude-seen auto --report DIR` end to end on a small prepared set: the
JSON has the session-knn row and the decision; report.html embeds decodable plots and escapes values."""

from __future__ import annotations

import base64
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image as mpimg

from offline.data.dataset import PreparedData, SessionSplit
from offline.evaluate.report import render, write_report
from service.cli import main


def random_split(seed: int, n_sessions: int, n_items: int) -> SessionSplit:
    rng = np.random.default_rng(seed)
    sessions = []
    for _ in range(n_sessions):
        clicks = [int(rng.integers(n_items))]
        for _ in range(int(rng.integers(1, 12))):
            step = int(rng.integers(1, 3)) if rng.random() < 0.8 else int(rng.integers(n_items))
            clicks.append((clicks[-1] + step) % n_items)
        sessions.append(clicks)
    return SessionSplit.from_sessions(sessions)


@pytest.fixture
def prepared(tmp_path: Path) -> Path:
    n_items = 40
    data = PreparedData(
        train=random_split(20, 400, n_items),
        valid=random_split(21, 60, n_items),
        test=random_split(22, 80, n_items),
        item_ids=[f"sku-{i:03d}" for i in range(n_items)],
    )
    folder = tmp_path / "prepared"
    data.save(folder)
    return folder


def test_evaluate_tunes_chooses_and_reports(prepared: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "report"
    rc = main(["evaluate", "--data", str(prepared), "--tune", "--exclude-seen", "auto", "--bootstrap", "50",
               "--cost-clicks", "50", "--out", str(out / "evaluation.json"), "--report", str(out)])  # fmt: skip
    assert rc == 0
    report = json.loads((out / "evaluation.json").read_text())  # strict JSON: no NaN
    assert "session-knn" in report and "recall@20" in report["session-knn"]
    decision = report["decision"]
    assert decision["session_knn"]["tuned"] is True and len(decision["session_knn"]["trials"]) == 8
    assert decision["exclude_seen"]["choice"] == "auto" and isinstance(decision["exclude_seen"]["value"], bool)
    assert decision["serving_defaults"] == {"exclude_seen": decision["exclude_seen"]["value"]}
    assert set(decision["serving_cost"]) == {"pop", "spop", "markov", "item-knn", "session-knn"}
    assert all(c["p99_ms"] >= c["p50_ms"] > 0 for c in decision["serving_cost"].values())
    verdict = decision["verdict"]
    assert verdict["strongest_simple"] in ("pop", "spop", "markov", "item-knn", "session-knn")
    assert set(decision["breakdowns"]["session-knn"]) >= {"position 1", "position 10+", "popularity head", "popularity tail"}
    assert len(decision["recall_curve"]["markov"]["value"]) == 50
    printed = capsys.readouterr().out
    assert "exclude-seen:" in printed and "cost per click, session-knn" in printed
    html = (out / "report.html").read_text()
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert len(images) >= 4  # Recall@k, lift, lift by group, worth-it (no GRU: no training plot)
    for data in images:
        picture = mpimg.imread(io.BytesIO(base64.b64decode(data)), format="png")
        assert picture.ndim == 3 and picture.shape[0] > 100
    for name in ("recall_at_k.png", "lift.png", "lift_by_group.png", "worth_it.png"):
        assert mpimg.imread(out / name).shape[0] > 100
    md = (out / "report.md").read_text()
    assert "session-knn" in md and "![" in md


def test_values_are_escaped_in_the_html(tmp_path: Path) -> None:
    hostile = "<script>alert(1)</script>"
    report = {
        hostile: {"recall@20": {"value": 0.5, "ci95": [0.4, 0.6]}, "events": 3, "sessions": 2},
        "decision": {"split": "test & <b>", "catalogue_items": 3, "verdict": {"recommendation": f"serve {hostile}"}},
    }
    html, md = render(report, {})
    assert hostile not in html and "&lt;script&gt;" in html and "test &amp; &lt;b&gt;" in html
    assert write_report(tmp_path / "r", report).is_file()


def test_bad_decision_options_exit_2(prepared: Path, capsys: pytest.CaptureFixture) -> None:
    for argv, message in (
        (["--p99-budget-ms", "fast"], "--p99-budget-ms must be a number >= 0, got 'fast'"),
        (["--sknn-neighbours", "0"], "--sknn-neighbours must be a positive integer, got '0'"),
        (["--cost-clicks", "-1"], "--cost-clicks must be an integer >= 0, got '-1'"),
    ):
        assert main(["evaluate", "--data", str(prepared), *argv]) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and message in err


def test_the_validation_sample_keeps_whole_sessions_in_order() -> None:
    from offline.evaluate.tuning import validation_sample

    split = random_split(5, 50, 30)
    sample = validation_sample(split, max_sessions=10, seed=1)
    assert sample.n_sessions == 10
    originals = {tuple(s.tolist()) for s in split.sessions()}
    assert all(tuple(s.tolist()) in originals and len(s) >= 2 for s in sample.sessions())
    assert validation_sample(split, max_sessions=1000).n_sessions == int((split.lengths() >= 2).sum())


def test_the_training_curve_comes_from_the_epoch_checkpoints(tmp_path: Path) -> None:
    from offline.evaluate.report import plot_training
    from offline.evaluate.training_curve import validation_curve
    from offline.model.gru import GRUConfig, NextClickGRU, save_checkpoint

    model = NextClickGRU(GRUConfig(n_items=10, embedding_size=4, hidden_size=4))
    for epoch, mrr in ((1, 0.11), (2, 0.17), (3, 0.16)):
        save_checkpoint(tmp_path / f"epoch-{epoch:03d}.pt", model, {"epoch": epoch, "valid": {"mrr@20": mrr, "recall@20": 2 * mrr, "events": 9}})
    save_checkpoint(tmp_path / "best.pt", model, {"epoch": 2, "valid": {"mrr@20": 0.17}})
    (tmp_path / "epoch-004.pt").write_bytes(b"not a checkpoint")  # a damaged file leaves a gap, not a failure
    curve = validation_curve(tmp_path / "best.pt")
    assert curve == [{"epoch": 1, "mrr@20": 0.11, "recall@20": 0.22}, {"epoch": 2, "mrr@20": 0.17, "recall@20": 0.34},
                     {"epoch": 3, "mrr@20": 0.16, "recall@20": 0.32}]  # fmt: skip
    png = plot_training({"training": {"gru-top1-max": curve}})
    assert mpimg.imread(io.BytesIO(png), format="png").shape[0] > 100


def test_a_report_with_a_gru_verdict_renders_every_plot(tmp_path: Path) -> None:
    from offline.evaluate.decision import build_decision
    from tests.offline.evaluate.test_decision import costs, results

    rs = results(0.6)
    settings = {"split": "test", "catalogue_items": 40, "exclude_seen": {"choice": "on", "value": True, "validation_recall": None}, "session_knn": None}
    decision = build_decision(rs, costs(3.0), 25.0, 100, 0, settings, training={"gru-top1-max": [{"epoch": 1, "mrr@20": 0.1}, {"epoch": 2, "mrr@20": 0.2}]})
    report = {**{n: r.to_json() for n, r in rs.items()}, "decision": decision}
    json.dumps(report, allow_nan=False)  # strict JSON
    page = write_report(tmp_path / "r", report)
    html = page.read_text()
    assert "serve gru-top1-max" in html and "95% CI" in html
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert len(images) == 5  # Recall@k, lift, lift by group, worth-it, training
    for data in images:
        assert mpimg.imread(io.BytesIO(base64.b64decode(data)), format="png").ndim == 3
