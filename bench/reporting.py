"""How every benchmark leaves its figures: one JSON file, written whole."""

from __future__ import annotations

import json
from pathlib import Path


def write_report(path: Path, report: dict) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
