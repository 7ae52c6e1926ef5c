"""The evaluator against scikit-learn, SciPy and brute force, and `cairn evaluate` end to end."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import label_ranking_average_precision_score, top_k_accuracy_score

from service.cli import main
from service.errors import InputDataError
from offline.evaluate.baselines import ItemKNN, Markov, Popularity, click_counts
from offline.data.dataset import PreparedData, SessionSplit
from offline.evaluate.evaluation import evaluate, format_table, lift, results_json, verdict_lines


class TableScorer:
    """Scores depend only on the last click: row `last` of a fixed random table [n_items, n_items]."""

    def __init__(self, table: np.ndarray, name: str = "table") -> None:
        self.table = table.astype(np.float32)
        self.n_items = table.shape[0]
        self.name = name

    def begin(self, n_sessions: int) -> None:
        pass

    def advance(self, items: np.ndarray) -> np.ndarray:
        return self.table[items]  # [n, n_items]


def random_split(seed: int, n_sessions: int, n_items: int, max_len: int = 8) -> SessionSplit:
    """Sessions that mostly step to a nearby item, so sequential models have something to learn."""
    rng = np.random.default_rng(seed)
    sessions = []
    for _ in range(n_sessions):
        clicks = [int(rng.integers(n_items))]
        for _ in range(int(rng.integers(0, max_len))):
            step = int(rng.integers(1, 3)) if rng.random() < 0.8 else int(rng.integers(n_items))
            clicks.append((clicks[-1] + step) % n_items)
        sessions.append(clicks)
    return SessionSplit.from_sessions(sessions)


def events_of(split: SessionSplit) -> tuple[np.ndarray, np.ndarray]:
    """(previous click, target) of every event, by brute force over the sessions."""
    prev, target = [], []
    for s in split.sessions():
        prev += s[:-1].tolist()
        target += s[1:].tolist()
    return np.array(prev), np.array(target)


def test_recall_and_mrr_equal_scikit_learn_over_the_events_of_a_split() -> None:
    # References: sklearn top_k_accuracy_score (Recall@k) and label_ranking_average_precision_score
    # (MRR without cut-off when each event has one relevant item), on the same (scores, target) pairs.
    n_items = 30
    split = random_split(seed=1, n_sessions=120, n_items=n_items)
    table = np.random.default_rng(2).standard_normal((n_items, n_items))
    scorer = TableScorer(table)
    result = evaluate(scorer, split, (5, 10, n_items), popularity=np.ones(n_items), batch_size=17, bootstrap=20)
    prev, target = events_of(split)
    scores = scorer.table[prev]
    for k in (5, 10):
        expected = top_k_accuracy_score(target, scores, k=k, labels=np.arange(n_items))
        assert result.metrics[f"recall@{k}"].value == pytest.approx(expected, abs=1e-12)
    relevant = np.zeros((len(target), n_items), dtype=int)
    relevant[np.arange(len(target)), target] = 1
    # A cut-off at n_items cuts nothing: MRR@n_items is the plain MRR.
    lrap = label_ranking_average_precision_score(relevant, scores)
    assert result.metrics[f"mrr@{n_items}"].value == pytest.approx(lrap, abs=1e-12)
    assert result.n_events == len(target)


def test_coverage_and_popularity_equal_brute_force() -> None:
    # Reference: the definitions, computed from full sorts of every event's scores.
    n_items = 25
    split = random_split(seed=3, n_sessions=40, n_items=n_items)
    table = np.random.default_rng(4).standard_normal((n_items, n_items))
    counts = np.random.default_rng(5).integers(1, 50, size=n_items)
    result = evaluate(TableScorer(table), split, (3,), popularity=counts, bootstrap=20)
    prev, _ = events_of(split)
    top = np.argsort(-table[prev], axis=1)[:, :3]  # [events, 3]
    assert result.metrics["coverage@3"].value == pytest.approx(len(np.unique(top)) / n_items)
    shares = counts / counts.sum()
    assert result.metrics["click_share@3"].value == pytest.approx(shares[top].mean(axis=1).mean())


def test_repeated_clicks_are_targets_and_single_clicks_are_skipped() -> None:
    split = SessionSplit.from_sessions([[1, 1, 1], [2], [0, 3]])
    pop = Popularity(np.array([5, 4, 3, 2]))  # POP order 0, 1, 2, 3
    result = evaluate(pop, split, (1, 2), popularity=pop.counts, bootstrap=20)
    # Events: 1 -> 1, 1 -> 1 (rank 2 each), 0 -> 3 (rank 4). The one-click session has none.
    assert (result.n_events, result.n_sessions) == (3, 2)
    assert result.metrics["recall@2"].value == pytest.approx(2 / 3)
    assert result.metrics["mrr@2"].value == pytest.approx((0.5 + 0.5 + 0) / 3)
    assert result.metrics["recall@1"].value == 0.0
    # The same list for everyone: items 0 and 1 are the whole top-2 coverage.
    assert result.metrics["coverage@2"].value == pytest.approx(2 / 4)


def test_recall_interval_agrees_with_scipy_bootstrap_over_sessions() -> None:
    # Reference: scipy.stats.bootstrap, paired=True so that a session's hits and events are drawn
    # together, statistic sum(hits) / sum(events), percentile method.
    n_items = 40
    train = random_split(seed=6, n_sessions=800, n_items=n_items)
    test = random_split(seed=7, n_sessions=300, n_items=n_items)
    result = evaluate(Markov.fit(train, n_items), test, (5,), popularity=click_counts(train, n_items), bootstrap=4000)
    hits = result.sums[:, result.columns.index("recall@5")]

    def ratio(h: np.ndarray, e: np.ndarray, axis: int = -1) -> np.ndarray:
        return h.sum(axis=axis) / e.sum(axis=axis)

    ref = stats.bootstrap(
        (hits, result.events), ratio, paired=True, vectorized=True, n_resamples=4000, method="percentile", random_state=1
    ).confidence_interval
    lo, hi = result.metrics["recall@5"].ci95
    assert lo == pytest.approx(ref.low, abs=0.008)
    assert hi == pytest.approx(ref.high, abs=0.008)
    assert lo < result.metrics["recall@5"].value < hi
    cov = result.metrics["coverage@5"]
    assert cov.ci95[0] <= cov.value <= cov.ci95[1]


def test_paired_lift_agrees_with_scipy_paired_bootstrap() -> None:
    # Reference: scipy.stats.bootstrap(paired=True) on the ratio of the two recommenders' recall,
    # each session's hits of both drawn together with its events.
    n_items = 40
    train = random_split(seed=8, n_sessions=800, n_items=n_items)
    test = random_split(seed=9, n_sessions=300, n_items=n_items)
    counts = click_counts(train, n_items)
    a = evaluate(Markov.fit(train, n_items), test, (5,), popularity=counts, bootstrap=4000)
    b = evaluate(ItemKNN.fit(train, n_items), test, (5,), popularity=counts, bootstrap=4000)
    point, (lo, hi) = lift(a, b, "recall@5")
    ha, hb = (r.sums[:, r.columns.index("recall@5")] for r in (a, b))
    assert point == pytest.approx(ha.sum() / hb.sum() - 1)

    def rel(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
        return x.sum(axis=axis) / y.sum(axis=axis) - 1

    ref = stats.bootstrap((ha, hb), rel, paired=True, vectorized=True, n_resamples=4000, method="percentile", random_state=2)
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.01)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.01)
    # Against itself the lift is exactly zero on every resample.
    assert lift(a, a, "mrr@5") == (0.0, (0.0, 0.0))
    assert lift(a, a, "coverage@5") == (0.0, (0.0, 0.0))


def test_lift_refuses_different_sessions() -> None:
    counts = np.ones(10)
    a = evaluate(Popularity(counts), random_split(1, 20, 10), popularity=counts, bootstrap=10)
    b = evaluate(Popularity(counts), random_split(2, 25, 10), popularity=counts, bootstrap=10)
    with pytest.raises(ValueError, match="same sessions"):
        lift(a, b, "recall@20")


def test_verdict_lines_compare_each_gru_with_the_strongest_sequential_baseline() -> None:
    n_items = 40
    train = random_split(seed=10, n_sessions=800, n_items=n_items)
    test = random_split(seed=11, n_sessions=300, n_items=n_items)
    counts = click_counts(train, n_items)
    markov = Markov.fit(train, n_items)
    knn = ItemKNN.fit(train, n_items)
    strong = Markov.fit(test, n_items)  # fitted on the test sessions themselves: must win
    strong.name = "gru-strong"
    weak = Popularity(counts)
    weak.name = "gru-weak"
    results = {s.name: evaluate(s, test, popularity=counts, bootstrap=200) for s in (weak, markov, knn, strong)}
    best = max(("markov", "item-knn"), key=lambda n: results[n].metrics["recall@20"].value)
    lines = verdict_lines(results)
    assert len(lines) == 2
    weak_line, strong_line = lines
    assert weak_line.startswith(f"gru-weak vs {best}: Recall@20 -") and weak_line.endswith(f"worse than {best}")
    assert strong_line.startswith(f"gru-strong vs {best}: Recall@20 +") and strong_line.endswith(f"better than {best}")
    assert "MRR@20" in strong_line and "95% CI" in strong_line
    table = format_table(results)
    assert table.splitlines()[0].split()[:3] == ["recommender", "recall@20", "mrr@20"]
    assert len(table.splitlines()) == 2 + 4
    assert verdict_lines({"gru-weak": results["gru-weak"]}) == [
        "gru-weak: no markov or item-knn or session-knn result with the same cut-off to compare with"
    ]


def test_json_holds_the_documented_keys() -> None:
    counts = np.ones(10)
    r = evaluate(Popularity(counts), random_split(1, 20, 10), (20, 5), popularity=counts, bootstrap=10)
    out = results_json([r])
    assert list(out) == ["pop"]
    assert set(out["pop"]) == {f"{m}@{k}" for m in ("recall", "mrr", "coverage", "click_share") for k in (20, 5)} | {
        "events",
        "sessions",
    }
    lo, hi = out["pop"]["recall@5"]["ci95"]
    assert lo <= out["pop"]["recall@5"]["value"] <= hi


def test_bad_input_to_evaluate() -> None:
    counts = np.ones(10)
    with pytest.raises(InputDataError, match="two or more clicks"):
        evaluate(Popularity(counts), SessionSplit.from_sessions([[1], [2]]), popularity=counts)
    with pytest.raises(InputDataError, match="outside"):
        evaluate(Popularity(counts), SessionSplit.from_sessions([[1, 12]]), popularity=counts)
    with pytest.raises(ValueError, match="positive integer"):
        evaluate(Popularity(counts), SessionSplit.from_sessions([[1, 2]]), (0,), popularity=counts)


# --- cairn evaluate -----------------------------------------------------------------------------


@pytest.fixture
def prepared(tmp_path: Path) -> Path:
    n_items = 30
    data = PreparedData(
        train=random_split(seed=20, n_sessions=300, n_items=n_items),
        valid=random_split(seed=21, n_sessions=40, n_items=n_items),
        test=random_split(seed=22, n_sessions=60, n_items=n_items),
        item_ids=[f"sku-{i:03d}" for i in range(n_items)],
    )
    folder = tmp_path / "prepared"
    data.save(folder)
    return folder


def test_cairn_evaluate_end_to_end(prepared: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    out = tmp_path / "reports" / "deep" / "eval.json"  # parent folders are created
    rc = main(["evaluate", "--data", str(prepared), "--k", "20", "5", "--bootstrap", "50", "--out", str(out)])
    assert rc == 0
    report = json.loads(out.read_text())
    assert list(report) == ["pop", "spop", "markov", "item-knn", "session-knn", "decision", "provenance"]
    # The report says what it is of.
    from offline.data.dataset import PreparedData
    from service import __version__

    prov = report["provenance"]
    assert prov["data"] == {"path": str(prepared), "fingerprint": PreparedData.load(prepared).fingerprint()}
    assert prov["split"] == "test" and prov["k"] == [20, 5] and prov["bootstrap"] == 50 and prov["seed"] == 0
    assert prov["baselines"]["item_knn"] == {"neighbours": 100, "regulariser": 20.0} and prov["cairn_version"] == __version__
    assert prov["checkpoints"] == {} and prov["artifacts"] == {}
    for name, entry in ((n, e) for n, e in report.items() if n not in ("decision", "provenance")):
        for k in (20, 5):
            for m in ("recall", "mrr", "coverage", "click_share"):
                metric = entry[f"{m}@{k}"]
                assert set(metric) == {"value", "ci95"} and len(metric["ci95"]) == 2
        assert entry["sessions"] > 0 and entry["events"] >= entry["sessions"]
    printed = capsys.readouterr().out
    assert "recall@20" in printed and "item-knn" in printed


def test_cairn_evaluate_on_the_validation_split_with_default_report(prepared: Path) -> None:
    rc = main(["evaluate", "--data", str(prepared), "--split", "valid", "--recommenders", "pop,markov", "--bootstrap", "20"])
    assert rc == 0
    report = json.loads((prepared / "evaluation-valid.json").read_text())
    assert list(report) == ["pop", "markov", "decision", "provenance"]


def test_cairn_evaluate_on_a_sample_of_sessions(prepared: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # --sessions N: every recommender on the same seeded sample of N test sessions; the figures are
    # those of evaluating the sampled split directly (SessionSplit.sample, the reference here).
    out = tmp_path / "sample.json"
    assert main(["evaluate", "--data", str(prepared), "--recommenders", "pop,markov", "--sessions", "25", "--bootstrap", "20", "--out", str(out)]) == 0
    assert "evaluating on 25 of 60 test sessions (--sessions)" in capsys.readouterr().err
    report = json.loads(out.read_text())
    assert report["provenance"]["sessions"] == 25 and report["pop"]["sessions"] == report["markov"]["sessions"] == 25
    data = PreparedData.load(prepared)
    counts = click_counts(data.train, data.n_items)
    direct = evaluate(Popularity(counts), data.test.sample(25, 0), popularity=counts, bootstrap=20)
    assert report["pop"]["recall@20"]["value"] == pytest.approx(direct.metrics["recall@20"].value)
    assert main(["evaluate", "--data", str(prepared), "--recommenders", "pop", "--bootstrap", "20", "--out", str(out)]) == 0
    assert json.loads(out.read_text())["provenance"]["sessions"] is None  # all of them


def test_bad_paths_fail_before_any_work(prepared: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    import time

    for args, named in (
        (["--checkpoint", str(tmp_path / "nope.pt")], "--checkpoint"),
        (["--artifact", str(tmp_path / "nowhere")], "--artifact"),
        (["--scenario", str(tmp_path / "none.npz")], "--scenario"),
    ):
        started = time.monotonic()
        assert main(["evaluate", "--data", str(prepared), "--bootstrap", "20", *args]) == 2
        err = capsys.readouterr().err
        assert named in err and "no such" in err and err.count("\n") == 1
        assert time.monotonic() - started < 2  # nothing was fitted first
    assert main(["evaluate", "--data", str(tmp_path / "missing")]) == 2
    assert "--data" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--k", "0"], "--k must be a positive integer, got '0'"),
        (["--k", "twenty"], "--k must be a positive integer, got 'twenty'"),
        (["--recommenders", "pop,gru"], "unknown recommender 'gru'"),
        (["--bootstrap", "-3"], "--bootstrap must be a positive integer, got '-3'"),
        (["--knn-regulariser", "x"], "--knn-regulariser must be a number >= 0, got 'x'"),
        (["--sessions", "-5"], "--sessions must be an integer >= 0, got '-5'"),
    ],
)
def test_cairn_evaluate_bad_options_exit_2_with_one_line(
    prepared: Path, capsys: pytest.CaptureFixture, argv: list[str], message: str
) -> None:
    rc = main(["evaluate", "--data", str(prepared), *argv])
    assert rc == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and message in err


def test_cairn_evaluate_missing_data_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    rc = main(["evaluate", "--data", str(tmp_path / "nowhere")])
    assert rc == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "nowhere" in err
