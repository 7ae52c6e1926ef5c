"""The side-by-side benchmark: its naive serving variants answer what the model answers, and a tiny
run reports every variant at every visit position. No timing is asserted (speed is the benchmark's
printout, never a test's verdict)."""

from __future__ import annotations

import contextlib
import json
import math
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
import torch

from bench import side_by_side
from bench.naive_serving import HISTORY_LENGTH, VARIANTS, create_app
from offline.export.artifact_writer import write_random_artifact
from offline.model.gru import load_checkpoint
from tests._support.servers import serve_app

N_ITEMS = 60
HIDDEN = 8
SEED = 5


@pytest.fixture(scope="module")
def artifact(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    store = tmp_path_factory.mktemp("sbs_store")
    path = write_random_artifact(store, "tiny", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=SEED)
    checkpoint = store / "same.pt"
    side_by_side._same_weights_checkpoint(path, HIDDEN, SEED, checkpoint)  # raises unless byte-equal to step.onnx
    return path, checkpoint


@contextlib.contextmanager
def _serve(app: object) -> Iterator[httpx.Client]:
    """The app on a real uvicorn (uvloop, httptools) in a thread, on a pre-bound loopback socket."""
    with serve_app(app) as url, httpx.Client(base_url=url, timeout=10) as client:
        yield client


def _reference_lists(checkpoint: Path, clicks: list[int], count: int) -> list[list[str]]:
    """Top `count` after each click, leaving out recent clicks, from PyTorch's nn.GRU one click at a
    time (torch.nn.GRU docs: h' = (1 - z) * n + z * h), independent of ONNX Runtime and the app."""
    model, _ = load_checkpoint(checkpoint)
    hidden = model.init_hidden(1)  # [1, 1, H]
    out = []
    with torch.no_grad():
        for k, item in enumerate(clicks):
            f, hidden = model.step(torch.tensor([item]), hidden)
            scores = model.score_all(f)[0]  # [n_items]
            seen = set(clicks[max(0, k - HISTORY_LENGTH) : k + 1])
            ranked = [int(i) for i in torch.argsort(scores, descending=True) if int(i) not in seen]
            out.append([f"sku-{i:06d}" for i in ranked[:count]])
    return out


@pytest.mark.parametrize("variant", VARIANTS)
def test_naive_variants_answer_the_models_lists(variant: str, artifact: tuple[Path, Path]) -> None:
    path, checkpoint = artifact
    # 27 clicks, longer than the excluded history, distinct but for a few repeats at the end; a long
    # list (30 of 60), so a click left in or out by mistake shows.
    clicks = [(7 * k) % N_ITEMS for k in range(24)] + [0, 0, 49]
    expected = _reference_lists(checkpoint, clicks, count=30)
    with _serve(create_app(variant, path, checkpoint)) as client:
        for k, item in enumerate(clicks):
            r = client.post("/v1/sessions/v-1/clicks", json={"item_id": f"sku-{item:06d}", "count": 30})
            assert r.status_code == 200, r.text
            body = r.json()
            assert [e["item_id"] for e in body["items"]] == expected[k], f"click {k + 1}"
            assert body["sequence"] == k + 1 and body["served_by"] == variant
        # The same request shape as the service: an unknown item is a 4xx naming it, a bad count too.
        r = client.post("/v1/sessions/v-1/clicks", json={"item_id": "sku-999999"})
        assert r.status_code == 422 and "sku-999999" in r.text
        assert client.post("/v1/sessions/v-1/clicks", json={"item_id": "sku-000001", "count": 0}).status_code == 422


def test_tiny_run_reports_every_variant_and_position(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "sbs.json"
    rc = side_by_side.main(["--items", "500", "--rounds", "2", "--warmup", "1", "--max-seconds", "30", "--out", str(out)])
    assert rc == 0
    report = json.loads(out.read_text())
    assert report["rounds"] == 2
    assert set(report["variants"]) == set(side_by_side.VARIANTS)
    for name, v in report["variants"].items():
        assert set(v["positions"]) == {"1", "10", "50"}, name
        assert len(v["median_ms_by_position"]) == 50
        for k, p in v["positions"].items():
            assert p["samples"] == 2 and p["median_ms"] > 0, (name, k)
            floor = report["variants"]["gru-step"]["positions"][k]["median_ms"]
            assert p["ratio_to_gru_step"] == pytest.approx(p["median_ms"] / floor, rel=1e-2)
        # Two rounds are all noise: the fitted line may even slope below zero, so only its form is checked here.
        assert v["growth"] > 0 and math.isfinite(v["fitted_growth"])
        # Ordinary least-squares slope in closed form, sum((x - mean x)(y - mean y)) / sum((x - mean x)^2)
        # (NIST/SEMATECH e-Handbook of Statistical Methods, 4.1.4.1; from memory).
        x, y = np.arange(1, 51), np.asarray(v["median_ms_by_position"])
        ols = float(((x - x.mean()) * (y - y.mean())).sum() / ((x - x.mean()) ** 2).sum())
        assert v["slope_ms_per_click"] == pytest.approx(ols, abs=1e-4), name
        intercept = float(y.mean() - ols * x.mean())
        if abs(intercept + ols) > 0.05 * y.mean():  # the fitted cost at k=1 is not about zero
            assert v["fitted_growth"] == pytest.approx((intercept + 50 * ols) / (intercept + ols), rel=2e-2, abs=2e-3), name
    assert report["variants"]["gru-step"]["positions"]["10"]["ratio_to_gru_step"] == 1.0
    for name in side_by_side.SERVICE:
        assert set(report["variants"][name]["server_timing_median_ms"]["50"]) == {"store", "model", "step", "total"}
    # The same weights answer the same lists through every GRU variant; the service never fell back.
    assert report["answers_agree_with_cairn_memory"] == {v: 1.0 for v in side_by_side.GRU_ANSWERS}
    assert not any(report["answers_from_another_recommender"].values())
    printed = capsys.readouterr().out
    assert "growth 50/1" in printed and "recompute-onnx" in printed


@pytest.mark.parametrize(
    ("args", "named"),
    [
        (["--lengths", "0", "5"], "--lengths"),
        (["--warmup", "-1"], "--warmup"),
        (["--items", "1"], "--items"),
        (["--max-seconds", "0"], "--max-seconds"),
    ],
)
def test_bad_options_are_one_line_errors(args: list[str], named: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert side_by_side.main([*args, "--out", str(tmp_path / "x.json")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: ") and named in err and "\n" not in err
    assert not (tmp_path / "x.json").exists()
