"""The quality summary: shares of the oracle and lifts, on a hand-made report."""

import json

import pytest

from bench.quality import main, summarise


def _m(v: float) -> dict:
    return {"value": v, "ci95": [v - 0.01, v + 0.01]}


REPORT = {
    "oracle": {"recall@20": _m(0.60), "mrr@20": _m(0.30)},
    "pop": {"recall@20": _m(0.30), "mrr@20": _m(0.10)},
    "markov": {"recall@20": _m(0.50), "mrr@20": _m(0.25)},
    "item-knn": {"recall@20": _m(0.40), "mrr@20": _m(0.20)},
    "gru-bpr-max": {"recall@20": _m(0.55), "mrr@20": _m(0.27)},
    "gru-top1": {"recall@20": _m(0.45), "mrr@20": _m(0.21)},
}


def test_best_gru_share_and_lifts_worked_by_hand():
    s = summarise(REPORT, "recall@20")
    assert s["best_gru"] == "gru-bpr-max"
    assert s["best_gru_share_of_oracle"] == pytest.approx(0.55 / 0.60)
    # Lift as the published comparisons state it: (gru - baseline) / baseline.
    assert s["lift_over_item_knn"] == pytest.approx(0.55 / 0.40 - 1)  # +37.5%
    assert s["strongest_simple_baseline"] == "markov"
    assert s["lift_over_strongest_simple_baseline"] == pytest.approx(0.10)


def test_a_report_without_oracle_or_gru_is_refused(tmp_path, capsys):
    no_gru = {k: v for k, v in REPORT.items() if not k.startswith("gru")}
    with pytest.raises(ValueError, match="no GRU"):
        summarise(no_gru)
    path = tmp_path / "e.json"
    path.write_text(json.dumps({"pop": REPORT["pop"]}))
    assert main(["--report", str(path), "--out", str(tmp_path / "q.json")]) == 2
    assert "no oracle" in capsys.readouterr().err
    assert not (tmp_path / "q.json").exists()
