"""Simulated visitors who respond to what they are shown: their click model, an experiment through
the real HTTP service (events -> report), and the check that matters: with the scenario's exact
oracle as one arm and popularity as the other, the oracle arm wins with a CI excluding zero."""

from __future__ import annotations

import json
from collections import defaultdict
from pathlib import Path

import numpy as np
from scipy.stats import binom

from loadtest.visitors import Visitors, examination, http_shop, run_visitors
from offline.demo.demo_log import generate
from offline.demo.oracle import ScenarioOracle
from offline.demo.params import ScenarioParams
from offline.demo.scenario import Scenario
from offline.online.event_source import read_events
from offline.online.report import build_report
from service.artifacts.format import load_artifact
from service.config import Settings
from service.events.experiment import parse_experiment
from tests._support.servers import serve_in_thread


def _tiny_scenario(item_ids: list[str], seed: int = 0) -> Scenario:
    rng = np.random.default_rng(seed)
    k, n = 3, len(item_ids)
    intent_items = rng.dirichlet(np.full(n, 0.3), size=k)
    transition = np.full((k, k), 0.1 / (k - 1)) + np.eye(k) * (0.9 - 0.1 / (k - 1))
    return Scenario(
        item_ids=item_ids, prior=np.full(k, 1 / k), transition=transition, intent_items=intent_items,
        link_items=np.full((n, 1), -1, dtype=np.int64), link_probs=np.zeros((n, 1)), follow_prob=0.0, reclick_prob=0.0,
    )  # fmt: skip


def test_a_visitor_takes_a_shown_item_with_the_position_weighted_chance() -> None:
    # P(next = shown item at rank r) = e_r p_i + (1 - sum_s e_s p_s) p_i  (looked and wanted, or own way)
    scenario = _tiny_scenario([f"i{j}" for j in range(5)])
    visitors = Visitors(scenario, seed=1)
    p = np.array([0.4, 0.3, 0.15, 0.1, 0.05])
    shown = ["i1", "i0"]
    e = examination(2)
    take = e * p[[1, 0]]
    expected = p * (1 - take.sum())
    expected[[1, 0]] += take
    n = 40_000
    counts = np.bincount([visitors.next_click(p, shown) for _ in range(n)], minlength=5)
    for j in range(5):
        low, high = binom.interval(1 - 1e-6, n, expected[j])  # scipy.stats.binom quantiles
        assert low <= counts[j] <= high, (j, counts[j], expected[j] * n)


class _LocalShop:
    """Two arms ranked in this process, the assignment by the service's own keyed hash: "oracle"
    shows the top of the exact next-click distribution (the service cannot serve it: it is not an
    artifact), "pop" the most clicked items of the log. Events in the service's format."""

    def __init__(self, scenario: Scenario, popularity: np.ndarray, experiment) -> None:
        self.scenario, self.popularity, self.experiment = scenario, popularity, experiment
        self.oracles: dict[str, ScenarioOracle] = {}
        self.seen: dict[str, list[int]] = defaultdict(list)
        self.events: list[dict] = []
        self.index = {s: i for i, s in enumerate(scenario.item_ids)}

    def __call__(self, session_id: str, item_id: str) -> list[str]:
        arm = self.experiment.assign(session_id).name
        item = self.index[item_id]
        self.seen[session_id].append(item)
        if arm == "oracle":
            oracle = self.oracles.get(session_id)
            if oracle is None:
                oracle = self.oracles[session_id] = ScenarioOracle(self.scenario, self.scenario.item_ids)
                oracle.begin(1)
            scores = oracle.advance(np.array([item]))[0].astype(np.float64)
        else:
            scores = self.popularity.astype(np.float64).copy()
        scores[self.seen[session_id]] = -np.inf  # as the service's exclude_seen does
        top = np.argsort(-scores, kind="stable")[:10]
        shown = [self.scenario.item_ids[i] for i in top]
        seq = len(self.seen[session_id])
        self.events.append({"t": float(len(self.events)), "session_id": session_id, "sequence": seq, "item_id": item_id,
                            "shown": shown, "served_by": arm, "fallback": None, "artifact": "local/1", "arm": arm,
                            "elapsed_ms": 0.1, "event_id": None, "duplicate": False})  # fmt: skip
        return shown


def test_the_oracle_arm_beats_popularity_with_a_ci_excluding_zero() -> None:
    params = ScenarioParams(sessions=2_000, items=300, intents=6, seed=3)
    log = generate(params)
    popularity = np.bincount(log.items, minlength=len(log.scenario.item_ids))
    experiment = parse_experiment({"name": "oracle-vs-pop", "salt": "visitors-test", "arms": [
        {"name": "pop", "artifact": "local/pop", "recommender": "popularity", "share": 0.5},
        {"name": "oracle", "artifact": "local/oracle", "recommender": "gru", "share": 0.5},
    ]})  # fmt: skip
    shop = _LocalShop(log.scenario, popularity, experiment)
    stats = run_visitors(Visitors(log.scenario, stop_prob=params.stop_prob, seed=4), shop, 600)
    report = build_report(shop.events, experiment, bootstrap=1000)
    (diff,) = report.differences
    assert diff.arm == "oracle" and diff.ci[0] > 0, report.verdict
    assert not report.sample_ratio.mismatch
    assert stats.took_shown > 0 and stats.clicks == len(shop.events)


def test_visitors_through_the_http_service_make_an_experiment_report(tmp_path: Path, model_store: Path, artifact_path: Path) -> None:
    scenario = _tiny_scenario(load_artifact(artifact_path).item_ids)
    declaration = {"name": "http-sim", "salt": "visitors-http", "arms": [
        {"name": "pop", "artifact": "demo/v1", "recommender": "popularity", "share": 0.5},
        {"name": "gru", "artifact": "demo/v1", "recommender": "gru", "share": 0.5},
    ]}  # fmt: skip
    (tmp_path / "exp.json").write_text(json.dumps(declaration), encoding="utf-8")
    events = tmp_path / "events"
    settings = Settings(artifacts=model_store, experiment=tmp_path / "exp.json", events=str(events), events_flush_s=0.1)
    with serve_in_thread(settings) as server, server.client() as client:
        stats = run_visitors(Visitors(scenario, seed=2), http_shop(client, count=5), 120)
    batch = read_events(str(events))
    assert len(batch.events) == stats.clicks
    report = build_report(batch.events, parse_experiment(declaration), bootstrap=200)
    assert [a.arm for a in report.arms] == ["pop", "gru"]
    assert sum(a.visits for a in report.arms) == 120
    assert {e["served_by"] for e in batch.events if e["arm"] == "pop"} == {"popularity"}
    assert not report.sample_ratio.mismatch


def test_cairn_simulate_runs_the_experiment_and_prints_both_verdicts(tmp_path: Path, model_store: Path, artifact_path: Path, capsys) -> None:
    from service.cli import main as cairn

    scenario_file = tmp_path / "scenario.npz"
    _tiny_scenario(load_artifact(artifact_path).item_ids).save(scenario_file)
    offline = tmp_path / "evaluation.json"
    offline.write_text(json.dumps({"gru-bpr-max": {"recall@20": {"value": 0.5}}, "item-knn": {"recall@20": {"value": 0.4}}}))
    code = cairn([
        "simulate", "--scenario", str(scenario_file), "--artifact", "demo/v1", "--artifacts", str(model_store),
        "--visits", "60", "--count", "5", "--out", str(tmp_path / "online"), "--offline-report", str(offline),
    ])  # fmt: skip
    out = capsys.readouterr().out
    assert code == 0, out
    assert "60 simulated visits" in out and "offline (Recall@20, held-out day): gru-bpr-max 0.5000 vs item-knn 0.4000" in out
    assert "agreement:" in out
    saved = json.loads((tmp_path / "online" / "report" / "experiment.json").read_text())
    assert [a["arm"] for a in saved["arms"]] == ["neighbours", "gru"] and sum(a["visits"] for a in saved["arms"]) == 60
