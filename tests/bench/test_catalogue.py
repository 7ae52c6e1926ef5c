"""bench/catalogue.py at a small size: every field of its report is filled, from real runs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from bench.catalogue import capacity_at_budget, files_for, main, parse_path
from bench.catalogue_chart import catalogue_rows
from offline.data.dataset import PreparedData, SessionSplit
from offline.export.artifact_writer import write_random_artifact


def test_small_catalogue_report(tmp_path: Path) -> None:
    # A random artifact of 3,000 items stands in for a trained one (its test split: random visits).
    trained = write_random_artifact(tmp_path / "store", "shop", "t1", n_items=3000, hidden_size=32, clusters=True, precisions=("int8", "int4"))
    rng = np.random.default_rng(0)
    visits = [rng.integers(0, 3000, rng.integers(2, 8)).tolist() for _ in range(200)]
    PreparedData(
        train=SessionSplit.from_sessions(visits), valid=SessionSplit.from_sessions(visits), test=SessionSplit.from_sessions(visits),
        item_ids=[f"sku-{i:06d}" for i in range(3000)],
    ).save(tmp_path / "prepared")
    out = tmp_path / "catalogue.json"
    argv = ["--sizes", "3000", "--paths", "exact", "int8", "int4", "clustered@4", "--paced-clicks", "20", "--max-clicks", "60", "--max-seconds", "1",
            "--trained", str(trained), "--trained-data", str(tmp_path / "prepared"), "--out", str(out)]  # fmt: skip
    assert main(argv) == 0
    report = json.loads(out.read_text())
    size = report["sizes"]["3000"]
    assert size["export"]["seconds"] > 0 and size["export"]["peak_rss_mb"] > 0 and size["export"]["artifact_mb"] > 0
    # Random weights: the default export builds no index (it says why) and holds int8 only; the int4 and
    # clustered rows come from a second export with them.
    assert size["export"]["item_clusters_skipped"]["probe_needed"] > 4 and size["export"]["again"]["seconds"] > 0
    assert size["export"]["again"]["flags"] == ["--precisions", "int8", "int4", "--clustered-index", "always"]
    assert size["export"]["item_clusters"]["clusters"] == 64  # about sqrt(3000), a power of two
    for rows in (size["paths"], report["trained"]["paths"]):
        for path in ("exact", "int8", "int4", "clustered@4"):
            r = rows[path]
            assert r["paced_50_per_s"]["clicks"] == 20 and r["paced_50_per_s"]["errors"] == 0
            assert r["concurrency_8"]["clicks"] > 0 and r["concurrency_8"]["errors"] == 0
            # From the worker's /metrics, per phase: 20 clicks at 50/s scored one by one, never held.
            assert {"batches", "batched_clicks", "held_clicks"} <= r["answers"].keys()  # read from the worker, not defaulted
            assert r["paced_50_per_s"]["batching"] == {"mean_batch": 1.0, "held_clicks": 0.0}
            assert 1.0 <= r["concurrency_8"]["batching"]["mean_batch"] <= 8.0
            # Capacity: the highest open-loop rate tried whose p99 stayed within the budget.
            cap = r["capacity"]
            within = [step["rate"] for step in cap["steps"] if step["p99_ms"] <= 25.0 and step["errors"] == 0]
            assert cap["budget_ms"] == 25.0 and len(cap["steps"]) >= 1
            assert cap["clicks_per_s"] == (max(within) if within else 0.0)
            over = [step["rate"] for step in cap["steps"] if step["rate"] not in within]
            assert all(rate > cap["clicks_per_s"] for rate in over)  # nothing above it was within, nothing below it over
            assert r["memory"]["rss_mb"] >= max(r["memory"]["private_mb"], r["memory"]["anonymous_mb"]) > 0
            scoring = path.partition("@")[0]
            assert r["answers"][f"scoring_{scoring}"] == r["answers"]["served_by_gru"] > 0  # every answer from the path asked for
        assert rows["exact"]["top20_agreement"] == 1.0
        assert rows["int8"]["top20_agreement"] >= 0.99 and rows["int4"]["top20_agreement"] >= 0.99
        assert 0 < rows["clustered@4"]["top20_agreement"] < 1  # 4 of 64 clusters of random weights: a visible loss
    assert report["trained"]["items"] == 3000
    # The picture beside the JSON: one point per row (each size's paths and the trained model's).
    assert out.with_suffix(".png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083, section 3.1)
    rows = catalogue_rows(report)
    assert len(rows) == 2 * 4 and {model for model, _, _ in rows} == {"random, 3,000", "trained, 3,000"}


def test_the_second_export_adds_only_what_the_paths_need() -> None:
    assert files_for(["exact", "int8"], has_index=False, n_items=3000) == ()
    assert files_for(["exact", "clustered@8"], has_index=True, n_items=3000) == ()
    assert files_for(["fp16", "clustered"], has_index=False, n_items=3000) == ("--precisions", "fp16", "int8", "--clustered-index", "always")
    assert files_for(["int4+int8"], has_index=False, n_items=3000) == ("--precisions", "int8", "int4")  # both tables
    # From 100,000 items the default export holds both packed tables already.
    assert files_for(["int4+int8", "int4"], has_index=False, n_items=100_000) == ()
    assert files_for(["fp16"], has_index=False, n_items=100_000) == ("--precisions", "fp16", "int8", "int4")


def test_path_names_are_checked() -> None:
    assert parse_path("clustered@32") == ("clustered", 32) and parse_path("int8") == ("int8", 0) and parse_path("int4+int8") == ("int4+int8", 0)
    for bad in ("int2", "int8@3", "clustered@0", "clustered@x"):
        with pytest.raises(Exception, match="expected one of"):
            parse_path(bad)
