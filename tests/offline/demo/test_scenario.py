"""The demo shop's generator and its exact oracle."""

from __future__ import annotations

import csv
import itertools
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import chisquare

from service.cli import main as cairn
from service.errors import InputDataError
from offline.demo.catalogue import build_catalogue
from offline.demo.demo_log import generate
from offline.demo.oracle import ScenarioOracle, load_oracle, next_click_distribution
from offline.demo.params import CATALOGUE_COLUMNS, CLICK_COLUMNS, DAY_S, ScenarioParams
from offline.demo.scenario import Scenario, build_scenario, simulate
from service.errors import ScenarioError

SMALL = ScenarioParams(sessions=3_000, items=300, intents=6, seed=3)


def tiny_scenario() -> Scenario:
    """6 items, 3 intents: items 0-2 carry follow-up links to items 3-5, which carry none."""
    rng = np.random.default_rng(0)
    k, n = 3, 6
    stay = 0.8
    switch = np.array([[0, 0.7, 0.3], [0.5, 0, 0.5], [0.2, 0.8, 0]])
    link_items = np.array([[3, 4], [4, 5], [5, -1], [-1, -1], [-1, -1], [-1, -1]])
    link_probs = np.array([[0.7, 0.3], [0.6, 0.4], [1.0, 0], [0, 0], [0, 0], [0, 0]])
    return Scenario(
        item_ids=[f"T{i}" for i in range(n)],
        prior=np.array([0.5, 0.3, 0.2]),
        transition=stay * np.eye(k) + (1 - stay) * switch,
        intent_items=rng.dirichlet(np.full(n, 0.7), size=k),
        link_items=link_items,
        link_probs=link_probs,
        follow_prob=0.3,
        reclick_prob=0.15,
    )


def brute_force_next(sc: Scenario, prefix: list[int]) -> np.ndarray:
    """P(next | prefix) by summing the joint probability over every intent path and every branch
    sequence, straight from the model's definition (law of total probability), with no recursion:
    the forward algorithm (Rabiner 1989, "A tutorial on hidden Markov models", eqs. 19-21, from
    memory) must give the same numbers."""
    k = sc.n_intents

    def branch_options(history: list[int]) -> list[tuple[float, np.ndarray | None]]:
        last = history[-1]
        links = np.zeros(sc.n_items)
        for j, p in zip(sc.link_items[last], sc.link_probs[last]):
            if j >= 0:
                links[j] += p
        earlier = sorted(set(history) - {last})
        back = np.zeros(sc.n_items)
        back[earlier] = 1 / len(earlier) if earlier else 0
        p_follow = sc.follow_prob if links.sum() > 0 else 0.0
        p_back = sc.reclick_prob if earlier else 0.0
        # (probability of the branch, distribution of the click; None = the intent's items)
        return [(p_follow, links), (p_back, back), (1 - p_follow - p_back, None)]

    def joint(seq: list[int]) -> float:
        total = 0.0
        for path in itertools.product(range(k), repeat=len(seq)):
            p_path = sc.prior[path[0]] * np.prod([sc.transition[a, b] for a, b in zip(path, path[1:])])
            for branches in itertools.product(range(3), repeat=len(seq) - 1):
                p = p_path * sc.intent_items[path[0], seq[0]]
                for t, b in enumerate(branches, start=1):
                    weight, dist = branch_options(seq[:t])[b]
                    p *= weight * (sc.intent_items[path[t], seq[t]] if dist is None else dist[seq[t]])
                total += p
        return total

    joints = np.array([joint([*prefix, i]) for i in range(sc.n_items)])
    return joints / joint(prefix) if prefix else joints


@pytest.mark.parametrize("prefix", [[], [0], [3], [0, 3], [1, 4, 0], [2, 5, 2], [3, 3], [5, 1, 4]])
def test_oracle_equals_brute_force_enumeration(prefix: list[int]) -> None:
    sc = tiny_scenario()
    got = next_click_distribution(sc, prefix)
    assert got.sum() == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(got, brute_force_next(sc, prefix), rtol=1e-10, atol=1e-14)


def _third_clicks(sc: Scenario, n: int, seed: int) -> np.ndarray:
    return simulate(sc, np.full(n, 3), np.random.default_rng(seed)).reshape(n, 3)


@pytest.mark.parametrize("prefix", [[1], [0, 3], [2, 5]])
def test_simulated_next_clicks_follow_the_oracle(prefix: list[int]) -> None:
    # Pearson's chi-square goodness-of-fit test (scipy.stats.chisquare): the sampler and the
    # oracle are written independently; the empirical next-click counts after a fixed prefix
    # must be consistent with the oracle's probabilities.
    sc = tiny_scenario()
    clicks = _third_clicks(sc, 200_000, seed=11)
    t = len(prefix)
    match = (clicks[:, :t] == prefix).all(1)
    observed = np.bincount(clicks[match, t], minlength=sc.n_items)
    expected = next_click_distribution(sc, prefix) * observed.sum()
    assert observed.sum() > 2_000 and expected.min() > 5  # the test's large-sample condition
    assert chisquare(observed, expected).pvalue > 1e-3
    # The same test has the power to reject a near miss: the intent part alone, without the
    # follow-up and re-click branches.
    wrong = next_click_distribution(replace(sc, follow_prob=0.0, reclick_prob=0.0), prefix)
    assert chisquare(observed, wrong * observed.sum()).pvalue < 1e-6


def test_re_clicks_pick_distinct_items_not_positions() -> None:
    # Calibration on a statistic the short-prefix test cannot see: how often the fifth click
    # returns to an item clicked at least twice before (and not last). Under the oracle the count
    # is a sum of independent Bernoulli variables; by the central limit theorem (Lyapunov form) its
    # z-score is standard normal, so |z| > 4 happens with probability about 6e-5 (scipy.stats.norm).
    from scipy.stats import norm

    sc = tiny_scenario()
    n = 100_000
    clicks = simulate(sc, np.full(n, 5), np.random.default_rng(21)).reshape(n, 5)
    oracle = ScenarioOracle(sc, sc.item_ids)
    oracle.begin(n)
    for t in range(4):
        probs = oracle.advance(clicks[:, t]).astype(np.float64)  # [n, 6] after the 4th click
    counts = np.stack([(clicks[:, :4] == i).sum(1) for i in range(sc.n_items)], 1)  # [n, 6]
    repeated = (counts >= 2) & (np.arange(sc.n_items)[None, :] != clicks[:, 3:4])  # [n, 6]
    p = (probs * repeated).sum(1)
    observed = repeated[np.arange(n), clicks[:, 4]].sum()
    z = (observed - p.sum()) / np.sqrt((p * (1 - p)).sum())
    assert repeated.any(1).mean() > 0.2  # the statistic is about many sessions
    assert 2 * norm.sf(abs(z)) > 6e-5


def test_batch_oracle_matches_the_plain_function_on_a_subset() -> None:
    sc = tiny_scenario()
    subset = ["T4", "T0", "T5", "T2"]  # prepared index j -> scenario item
    scen_idx = [4, 0, 5, 2]
    oracle = ScenarioOracle(sc, subset)
    assert oracle.name == "oracle" and oracle.n_items == 4
    sessions = [[1, 3, 2, 0], [3, 2, 3, 3], [0, 1, 0, 1]]  # prepared indices
    oracle.begin(len(sessions))
    for t in range(4):
        scores = oracle.advance(np.array([s[t] for s in sessions]))
        assert scores.dtype == np.float32 and scores.shape == (3, 4)
        for row, s in enumerate(sessions):
            full = next_click_distribution(sc, [scen_idx[j] for j in s[: t + 1]])
            np.testing.assert_allclose(scores[row], full[scen_idx], rtol=1e-6, atol=1e-7)


def test_load_oracle_aligns_scores_to_the_given_ids(tmp_path: Path) -> None:
    log = generate(SMALL)
    path = tmp_path / "scenario.npz"
    log.scenario.save(path)
    rng = np.random.default_rng(5)
    subset = rng.choice(log.scenario.n_items, 120, replace=False)
    oracle = load_oracle(path, [log.scenario.item_ids[i] for i in subset])
    prefix = [int(subset[7]), int(subset[3]), int(subset[7])]
    oracle.begin(2)
    for item in prefix:
        scores = oracle.advance(np.array([list(subset).index(item)] * 2))
    full = next_click_distribution(log.scenario, prefix)
    np.testing.assert_allclose(scores[1], full[subset], rtol=1e-5, atol=1e-8)
    with pytest.raises(InputDataError, match="'GS-99999'"):
        load_oracle(path, ["GS-99999"])


def test_scenario_file_round_trip(tmp_path: Path) -> None:
    sc = tiny_scenario()
    sc.save(tmp_path / "s.npz")
    back = Scenario.load(tmp_path / "s.npz")
    assert back.item_ids == sc.item_ids
    for name in ("prior", "transition", "intent_items", "link_items", "link_probs"):
        np.testing.assert_array_equal(getattr(back, name), getattr(sc, name))
    with pytest.raises(InputDataError, match="no scenario file"):
        Scenario.load(tmp_path / "missing.npz")


def test_follow_ups_run_from_main_products_to_accessories() -> None:
    rng = np.random.default_rng(1)
    cat = build_catalogue(SMALL, rng)
    sc, _ = build_scenario(SMALL, rng, cat)
    has = sc.has_links()
    assert (has <= cat.is_main).all() and has[cat.is_main].mean() > 0.99
    targets = sc.link_items[sc.link_items >= 0]
    assert not cat.is_main[targets].any()  # accessory -> main never happens through a link


def test_generation_is_deterministic_for_a_seed() -> None:
    a, b, c = generate(SMALL), generate(SMALL), generate(replace(SMALL, seed=4))
    for name in ("items", "offsets", "times", "session_ids", "visitors"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    assert a.catalogue.names == b.catalogue.names
    assert not np.array_equal(a.items[:1000], c.items[:1000])


def test_default_session_lengths_and_time_layout() -> None:
    params = ScenarioParams(scale=0.05)  # the default scenario, scaled down to 4,000 sessions
    log = generate(params)
    lengths = np.diff(log.offsets)
    assert 3.0 <= lengths.mean() <= 6.0
    assert 3.0 <= lengths[lengths > 1].mean() <= 6.0  # what remains after the ingest drops singles
    start = params.start_epoch()
    day = (log.times - start) // DAY_S
    assert day.min() == 0 and day.max() == params.days - 1
    assert np.bincount(day).min() > 0  # every day has traffic, so the last two days can be split off
    sess = np.repeat(np.arange(log.n_sessions), lengths)
    first_day = day[log.offsets[:-1]]
    assert (day == first_day[sess]).all()  # no session straddles midnight
    gaps = np.diff(log.times)[np.diff(sess) == 0]
    assert gaps.min() >= 1 and np.median(gaps) == pytest.approx(params.think_time_median, rel=0.15)
    # a visitor's visits fall on distinct days
    pairs = np.unique(np.stack([log.visitors, first_day], 1), axis=0)
    assert len(pairs) == log.n_sessions


def test_cli_writes_the_three_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    code = cairn(["demo-data", "--out", str(out), "--sessions", "2000", "--items", "200", "--days", "5",
                  "--start-date", "2024-05-01", "--seed", "9"])  # fmt: skip
    assert code == 0
    assert "2,000 sessions" in capsys.readouterr().out
    with open(out / "clicks.csv", newline="") as f:
        rows = list(csv.reader(f))
    assert tuple(rows[0]) == CLICK_COLUMNS
    with open(out / "catalogue.csv", newline="") as f:
        cat_rows = list(csv.reader(f))
    assert tuple(cat_rows[0]) == CATALOGUE_COLUMNS and len(cat_rows) == 201
    ids = {r[0] for r in cat_rows[1:]}
    assert all(r[2] in ids for r in rows[1:])
    stamps = np.array([int(r[3]) for r in rows[1:]])
    start = 1714521600  # 2024-05-01T00:00:00Z (date -u -d 2024-05-01 +%s)
    assert stamps.min() >= start and stamps.max() < start + 5 * DAY_S
    assert len({r[0] for r in rows[1:]}) == 2000
    sc = Scenario.load(out / "scenario.npz")
    assert sc.item_ids == [r[0] for r in cat_rows[1:]]


@pytest.mark.parametrize(
    ("flags", "message"),
    [
        (["--follow-prob", "0.95"], "follow-prob=0.95"),
        (["--stop-prob", "0"], "stop-prob=0.0"),
        (["--items", "5"], "items=5"),
        (["--start-date", "2024-13-01"], "start-date='2024-13-01'"),
    ],
)
def test_cli_rejects_bad_parameters(tmp_path: Path, capsys: pytest.CaptureFixture[str], flags: list[str], message: str) -> None:
    assert cairn(["demo-data", "--out", str(tmp_path / "x"), *flags]) == 2
    err = capsys.readouterr().err.strip()
    assert message in err and "\n" not in err and not (tmp_path / "x").exists()


def test_params_validate_names_the_value() -> None:
    with pytest.raises(ScenarioError, match="intents=0"):
        ScenarioParams(intents=0).validate()


def test_distinct_draws_are_numpys_choice_without_replacement() -> None:
    # Reference: numpy's Generator.choice(n, size, replace=False, p=p). From the same seed the
    # shop's follow-up links must come out as that call draws them (so a seed gives the catalogue
    # it always gave), including skewed distributions where the first round draws repeats.
    from offline.demo.scenario import _DistinctDraws

    for trial in range(500):
        r = np.random.default_rng(trial)
        n = int(r.integers(5, 300))
        w = r.random(n) ** 3
        w[r.random(n) < 0.3] = 0
        draws = _DistinctDraws(w / w.sum())
        size = int(r.integers(1, min(draws.support, 8) + 1))
        ours, numpys = np.random.default_rng(trial + 1), np.random.default_rng(trial + 1)
        for _ in range(3):  # several draws from one distribution, as the catalogue makes them
            assert draws.draw(ours, size).tolist() == numpys.choice(n, size=size, replace=False, p=w / w.sum()).tolist(), trial
        assert ours.random() == numpys.random()  # the same share of the stream was used
    with pytest.raises(ValueError, match="3 distinct draws from 2 items"):
        _DistinctDraws(np.array([0.5, 0.0, 0.5])).draw(np.random.default_rng(0), 3)
