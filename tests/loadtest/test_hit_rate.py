"""Serving and offline evaluation compute the same thing: replayed once, without think times or
fallbacks and with exclude_seen off, the hit rate the visitors saw equals the offline Recall@count
of the same visits and the same model.

Recall@k is the share of next-click cases whose clicked item is among the top k recommended
(Hidasi et al. 2016, "Session-based recommendations with recurrent neural networks", section 4,
from memory); offline it counts repeated clicks as targets, hence exclude_seen off. The offline
side here reads the artifact's neighbour table directly: the neighbours recommender answers a
click with the head of that click's row.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import load_artifact
from service.cli import main
from offline.data.dataset import PreparedData, SessionSplit

COUNT = 5


@pytest.fixture(scope="module")
def walk_data(tmp_path_factory: pytest.TempPathFactory, artifact_path: Path) -> Path:
    """Visits that mostly follow the neighbour table (so Recall@5 is far from 0 and from 1):
    each next click is one of the first 10 neighbours of the click before, or, 30% of the time,
    any item."""
    a = load_artifact(artifact_path)
    rng = np.random.default_rng(5)
    sessions = []
    for _ in range(36):
        s = [int(rng.integers(0, a.n_items))]
        for _ in range(int(rng.integers(0, 7))):
            if rng.random() < 0.7:
                s.append(int(a.neighbour_items[s[-1], rng.integers(0, 10)]))
            else:
                s.append(int(rng.integers(0, a.n_items)))
        sessions.append(s)
    test = SessionSplit.from_sessions(sessions, [[1_700_000_000 + 3 * t for t in range(len(s))] for s in sessions])
    folder = tmp_path_factory.mktemp("walk") / "prepared"
    PreparedData(train=test, valid=test, test=test, item_ids=a.item_ids).save(folder)
    return folder


def offline_recall(artifact_path: Path, data: Path, k: int) -> tuple[int, int]:
    """(hits, cases) of Recall@k of the neighbour table over the test visits, computed here."""
    a = load_artifact(artifact_path)
    test = PreparedData.load(data).test
    hits = cases = 0
    for s in range(test.n_sessions):
        clicks = test.session(s)
        for t in range(1, len(clicks)):
            row = a.neighbour_items[clicks[t - 1]]
            top = row[row >= 0][:k]
            assert len(top) == k  # the table row alone fills the answer: no popularity filler
            cases += 1
            hits += int(clicks[t] in top)
    return hits, cases


def test_replayed_hit_rate_equals_offline_recall(tmp_path: Path, model_store: Path, artifact_path: Path, walk_data: Path, capsys) -> None:
    hits, cases = offline_recall(artifact_path, walk_data, COUNT)
    assert 0.15 < hits / cases < 0.85  # the check can tell a right answer from a wrong one

    report_dir = tmp_path / "report"
    rc = main([
        "loadtest", "--serve", "--recommender", "neighbours", "--session-store", "memory", "--artifacts", str(model_store),
        "--data", str(walk_data), "--replay", "once", "--think-scale", "0", "--users", "3", "--load-workers", "1",
        "--duration", "60", "--count", str(COUNT), "--p99-budget-ms", "1000", "--max-error-rate", "0",
        "--report", str(report_dir),
    ])  # fmt: skip
    out = capsys.readouterr().out
    assert rc == 0, out
    r = json.loads((report_dir / "loadtest.json").read_text(encoding="utf-8"))
    test = PreparedData.load(walk_data).test
    # Every visit was replayed exactly once, and the run ended when they were done.
    assert r["visits"]["available"] == r["visits"]["taken"] == test.n_sessions
    overall = r["overall"]
    assert overall["visits_completed"] == test.n_sessions
    assert overall["requests"] == test.n_clicks
    # No fallbacks: every answer came from the neighbour table.
    assert overall["served_by"] == {"neighbours": 1.0}
    assert overall["fallback_reason"] == {"none": 1.0}
    assert (overall["hits"], overall["hit_events"]) == (hits, cases)
    assert overall["hit_rate"] == pytest.approx(hits / cases, abs=1e-4)
