"""Experiment assignment and arms side by side: hash shares within binomial bounds, the same arm on
every process, each arm served by its own artifact, the arm in answers, events and metrics, and an
arm switched with the same safety rules as the single model."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from scipy.stats import binom

from offline.online.event_source import read_events
from service.errors import ExperimentError
from service.events.experiment import load_experiment, parse_experiment


def _declaration(**arms: tuple[str, str, float]) -> dict:
    return {
        "name": "test-exp",
        "salt": "salt-of-the-test",
        "arms": [{"name": n, "artifact": a, "recommender": r, "share": s} for n, (a, r, s) in arms.items()],
    }


def test_shares_within_binomial_bounds_for_100k_ids() -> None:
    exp = parse_experiment(_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.3), c=("x/3", "popularity", 0.2)))
    n = 100_000
    counts = {"a": 0, "b": 0, "c": 0}
    for i in range(n):
        counts[exp.assign(f"visit-{i}").name] += 1
    for name, share in exp.shares().items():
        # Each arm's count is Binomial(n, share) when the hash behaves as a uniform draw; its central
        # 1 - 1e-6 interval from the binomial quantile function (scipy.stats.binom.interval).
        low, high = binom.interval(1 - 1e-6, n, share)
        assert low <= counts[name] <= high, (name, counts[name], low, high)
        # The same bound by the normal approximation to the binomial (de Moivre-Laplace):
        # |count - n p| <= z sqrt(n p (1 - p)), z = 4.89 for a two-sided 1e-6 (standard normal quantile).
        assert abs(counts[name] - n * share) <= 4.89 * (n * share * (1 - share)) ** 0.5


def test_assignment_is_stable_and_depends_on_the_salt() -> None:
    one = parse_experiment(_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.5)))
    again = parse_experiment(_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.5)))
    other = parse_experiment({**_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.5)), "salt": "another-salt"})
    ids = [f"s{i}" for i in range(2000)]
    assert [one.assign(s).name for s in ids] == [again.assign(s).name for s in ids]
    moved = sum(one.assign(s).name != other.assign(s).name for s in ids)
    assert 800 < moved < 1200  # a new salt reshuffles about half the visits between two even arms


@pytest.mark.parametrize(
    "change, names",
    [
        ({"salt": "short"}, "salt"),
        ({"arms": []}, "arms"),
        ({"extra": 1}, "extra"),
    ],
)
def test_bad_declarations_name_the_field(change: dict, names: str) -> None:
    with pytest.raises(ExperimentError, match=names):
        parse_experiment({**_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.5)), **change})


def test_bad_arms_name_the_value(tmp_path: Path) -> None:
    with pytest.raises(ExperimentError, match="add up to 0.9"):
        parse_experiment(_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.4)))
    with pytest.raises(ExperimentError, match="recommender='lstm'"):
        parse_experiment(_declaration(a=("x/1", "lstm", 0.5), b=("x/2", "gru", 0.5)))
    with pytest.raises(ExperimentError, match="artifact='x'"):
        parse_experiment(_declaration(a=("x", "gru", 0.5), b=("x/2", "gru", 0.5)))
    bad = tmp_path / "exp.toml"
    bad.write_text("name = [", encoding="utf-8")
    with pytest.raises(ExperimentError, match="not valid TOML"):
        load_experiment(bad)


def test_toml_and_json_declarations_read_the_same(tmp_path: Path) -> None:
    toml = tmp_path / "exp.toml"
    toml.write_text(
        'name = "test-exp"\nsalt = "salt-of-the-test"\n'
        '[[arms]]\nname = "a"\nartifact = "x/1"\nrecommender = "gru"\nshare = 0.5\n'
        '[[arms]]\nname = "b"\nartifact = "x/2"\nrecommender = "gru"\nshare = 0.5\n',
        encoding="utf-8",
    )
    js = tmp_path / "exp.json"
    js.write_text(json.dumps(_declaration(a=("x/1", "gru", 0.5), b=("x/2", "gru", 0.5))), encoding="utf-8")
    assert load_experiment(toml) == load_experiment(js)


@pytest.mark.parametrize("store", ["memory", "redis"])
def test_arms_serve_side_by_side(store: str, serve, settings_for, redis_url: str, sid, tmp_path: Path, token: str, offline) -> None:
    path = tmp_path / "exp.json"
    path.write_text(json.dumps(_declaration(gru=("shop/v1", "gru", 0.5), pop=("shop/v2", "popularity", 0.5))), encoding="utf-8")
    exp = load_experiment(path)
    events = tmp_path / "events"
    settings = settings_for(redis_url if store == "redis" else "memory", experiment=path, events=str(events))
    clicks = ["sku-000005", "sku-000050", "sku-000150"]
    with serve(settings) as server, server.client() as c:
        seen_arms = set()
        for _ in range(12):
            session = sid("arm")
            arm = exp.assign(session).name
            for n, item in enumerate(clicks, start=1):
                body = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 4}).json()
                assert body["arm"] == arm
                if arm == "gru":
                    assert (body["artifact"], body["served_by"]) == ("shop/v1", "gru")
                    assert [i["item_id"] for i in body["items"]] == offline["v1"].top(clicks[:n], count=4)[0]
                else:
                    assert (body["artifact"], body["served_by"]) == ("shop/v2", "popularity")
            seen_arms.add(arm)
        assert seen_arms == {"gru", "pop"}
        metrics = c.get("/metrics").text
        assert 'cairn_arm_recommendation_duration_seconds_count{arm="gru",served_by="gru"}' in metrics
        assert 'cairn_arm_serving_info{arm="pop",name="shop",recommender="popularity",version="v2"} 1.0' in metrics
        # An arm switch follows the switch's rules: an artifact that fails verification is refused and the arm keeps serving.
        auth = {"authorization": f"Bearer {token}"}
        r = c.put("/v1/serving", json={"name": "shop", "version": "v0-broken", "arm": "gru"}, headers=auth)
        assert r.status_code == 409
        r = c.put("/v1/serving", json={"name": "shop", "version": "v2"}, headers=auth)
        assert r.status_code == 409 and r.json()["field"] == "arm"
        r = c.put("/v1/serving", json={"name": "shop", "version": "v2", "arm": "gru"}, headers=auth)
        assert r.status_code == 200 and r.json()["arm"] == "gru"
        session = next(s for s in (sid("after") for _ in range(100)) if exp.assign(s).name == "gru")
        body = c.post(f"/v1/sessions/{session}/clicks", json={"item_id": clicks[0], "count": 4}).json()
        assert (body["arm"], body["artifact"], body["served_by"]) == ("gru", "shop/v2", "gru")
    arms = {e["arm"] for e in read_events(str(events)).events}
    assert arms == {"gru", "pop"}


def test_answers_carry_no_arm_without_an_experiment(serve, settings_for, sid, token: str) -> None:
    with serve(settings_for()) as server, server.client() as c:
        body = c.post(f"/v1/sessions/{sid()}/clicks", json={"item_id": "sku-000005"}).json()
        assert "arm" not in body
        r = c.put("/v1/serving", json={"name": "shop", "version": "v1", "arm": "gru"}, headers={"authorization": f"Bearer {token}"})
        assert r.status_code == 409 and r.json()["field"] == "arm"


def test_a_bad_experiment_file_stops_start_up_with_one_line(settings_for, tmp_path: Path) -> None:
    import asyncio

    from service.api.app import create_app

    path = tmp_path / "exp.json"
    path.write_text(json.dumps(_declaration(a=("shop/v1", "gru", 0.5), b=("shop/v9", "gru", 0.5))), encoding="utf-8")
    app = create_app(settings_for(experiment=path))

    async def start() -> None:
        async with app.router.lifespan_context(app):
            pass

    with pytest.raises(Exception, match="no artifact shop/v9"):
        asyncio.run(start())


@pytest.mark.parametrize(
    "declaration, message",
    [
        ({"name": "x"}, "salt=None"),
        (_declaration(a=("shop/v1", "gru", 0.5), b=("shop/v9", "gru", 0.5)), "arm 'b': no artifact shop/v9"),
        (_declaration(a=("shop/v1", "gru", 0.5), b=("shop/v0-broken", "gru", 0.5)), "arm 'b': artifact shop/v0-broken cannot be served"),
    ],
)
def test_cairn_serve_refuses_a_bad_experiment_in_one_line(declaration, message, model_store: Path, tmp_path: Path, monkeypatch, capsys) -> None:
    from service.cli import main as cairn

    path = tmp_path / "exp.json"
    path.write_text(json.dumps(declaration), encoding="utf-8")
    monkeypatch.setenv("CAIRN_EXPERIMENT", str(path))
    monkeypatch.setenv("CAIRN_ARTIFACTS", str(model_store))
    assert cairn(["serve", "--port", "1"]) == 2
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_cairn_serve_refuses_an_events_folder_it_cannot_create(model_store: Path, tmp_path: Path, monkeypatch, capsys) -> None:
    from service.cli import main as cairn

    blocker = tmp_path / "file"
    blocker.write_text("x")
    monkeypatch.setenv("CAIRN_EVENTS", str(blocker / "events"))
    monkeypatch.setenv("CAIRN_ARTIFACTS", str(model_store))
    monkeypatch.setenv("CAIRN_ARTIFACT_NAME", "shop")
    assert cairn(["serve", "--port", "1"]) == 2
    assert "CAIRN_EVENTS=" in capsys.readouterr().err


def test_an_arm_switch_reaches_every_worker_and_survives_a_restart(serve, settings_for, redis_url: str, sid, tmp_path: Path, token: str) -> None:
    import time

    path = tmp_path / "exp.json"
    path.write_text(json.dumps(_declaration(gru=("shop/v1", "gru", 0.5), pop=("shop/v1", "popularity", 0.5))), encoding="utf-8")
    exp = load_experiment(path)
    prefix = f"{sid('arms')}:"
    settings = settings_for(redis_url, experiment=path, redis_prefix=prefix, model_poll_s=0.05)
    gru_visit = next(s for s in (sid("g") for _ in range(100)) if exp.assign(s).name == "gru")
    pop_visit = next(s for s in (sid("p") for _ in range(100)) if exp.assign(s).name == "pop")

    def artifact_of(c, session: str) -> str:
        return c.post(f"/v1/sessions/{session}/clicks", json={"item_id": "sku-000005"}).json()["artifact"]

    with serve(settings) as a, serve(settings) as b, a.client() as ca, b.client() as cb:
        r = ca.put("/v1/serving", json={"name": "shop", "version": "v2", "arm": "gru"}, headers={"authorization": f"Bearer {token}"})
        assert r.status_code == 200
        deadline = time.monotonic() + 5
        while artifact_of(cb, gru_visit) != "shop/v2":
            assert time.monotonic() < deadline, "worker b did not follow the arm switch"
            time.sleep(0.05)
        assert artifact_of(cb, pop_visit) == "shop/v1"  # the other arm is untouched
    with serve(settings) as again, again.client() as c:
        assert artifact_of(c, gru_visit) == "shop/v2" and artifact_of(c, pop_visit) == "shop/v1"
