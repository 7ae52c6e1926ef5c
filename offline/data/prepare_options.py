"""What `cairn prepare` is asked to do (PrepareOptions) and what it did (PrepareReport)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any


FORMATS = ("auto", "csv", "tsv", "parquet")
TIME_UNITS = ("auto", "s", "ms", "iso")
REPORT_FILE = "prepare_report.json"


@dataclass(frozen=True)
class PrepareOptions:
    """What `cairn prepare` was asked to do; defaults follow the published protocol."""

    input: Path
    item_column: str
    time_column: str
    session_column: str | None = None
    visitor_column: str | None = None  # instead of session_column: cut each visitor's clicks at gaps
    format: str = "auto"  # one of FORMATS; auto goes by the file suffix
    time_unit: str = "auto"  # one of TIME_UNITS
    session_gap_minutes: float = 30.0  # inactivity that ends a web session (common practice)
    min_session_length: int = 2  # Hidasi et al. 2016 drop sessions of length 1
    min_item_clicks: int = 5  # Hidasi et al. 2016 drop items clicked fewer than 5 times
    test_days: float = 1.0  # Hidasi et al. 2016 test on the sessions of the last day
    valid_days: float = 1.0  # the day before the test day, for early stopping and tuning


@dataclass(frozen=True)
class StepCount:
    step: str
    rows_removed: int
    sessions_removed: int
    rows_left: int
    sessions_left: int


@dataclass
class PrepareReport:
    input: str
    format: str
    time_unit: str  # the unit actually used (auto resolved)
    sessions_from: str
    options: dict[str, Any]
    steps: list[StepCount] = field(default_factory=list)
    splits: dict[str, dict[str, Any]] = field(default_factory=dict)
    n_items: int = 0
    fingerprint: str = ""

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["steps"] = [asdict(s) for s in self.steps]
        return d

    def format_table(self) -> str:
        """The steps and the splits as a small plain-text table for the terminal."""
        head = ("step", "rows removed", "sessions removed", "rows left", "sessions left")
        rows = [head] + [
            (s.step, f"{s.rows_removed:,}", f"{s.sessions_removed:,}", f"{s.rows_left:,}", f"{s.sessions_left:,}")
            for s in self.steps
        ]
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = ["  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths))) for r in rows]
        lines.insert(1, "  ".join("-" * w for w in widths))
        lines.append("")
        for name, s in self.splits.items():
            lines.append(
                f"{name:<5}  {s['sessions']:>12,} sessions  {s['clicks']:>13,} clicks  "
                f"starts {s['first_start'] or '-'} .. {s['last_start'] or '-'}"
            )
        lines.append(f"items  {self.n_items:,} (the training vocabulary)")
        return "\n".join(lines)

