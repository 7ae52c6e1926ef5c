"""bench/catalogue.py at a small size: every field of its report is filled, from real runs."""

from __future__ import annotations

import json
from pathlib import Path

from bench.catalogue import main


def test_small_catalogue_report(tmp_path: Path) -> None:
    out = tmp_path / "catalogue.json"
    argv = ["--sizes", "3000", "--paths", "exact", "int8", "--paced-clicks", "20", "--max-clicks", "60", "--max-seconds", "1", "--out", str(out)]
    assert main(argv) == 0
    size = json.loads(out.read_text())["sizes"]["3000"]
    assert size["export"]["seconds"] > 0 and size["export"]["peak_rss_mb"] > 0 and size["export"]["artifact_mb"] > 0
    for path in ("exact", "int8"):
        r = size["paths"][path]
        assert r["paced_50_per_s"]["clicks"] == 20 and r["paced_50_per_s"]["errors"] == 0
        assert r["concurrency_8"]["clicks"] > 0 and r["concurrency_8"]["errors"] == 0
        assert r["memory"]["rss_mb"] >= max(r["memory"]["private_mb"], r["memory"]["anonymous_mb"]) > 0
        assert r["answers"][f"scoring_{path}"] == r["answers"]["served_by_gru"] > 0  # every answer from the path asked for
    assert size["paths"]["exact"]["top20_agreement"] == 1.0
    assert size["paths"]["int8"]["top20_agreement"] >= 0.99
