"""`cairn events export`: the service's click events as a click log that `cairn prepare` reads as is.

Columns (one row per answered click, time order):
    session_id  the visit (its pseudonym when CAIRN_EVENTS_KEY was set)
    item_id     the clicked item
    timestamp   epoch milliseconds (prepare's `--time-unit auto` reads numbers above 1e11 as ms)
    arm         the experiment arm ("" without an experiment)
    served_by   what answered the click
Replayed clicks (`duplicate`) are left out: the service applied them once. Then:

    cairn prepare --input clicks.csv --out data/next --session-column session_id \\
        --item-column item_id --time-column timestamp
"""

from __future__ import annotations

from pathlib import Path

import polars as pl

from service.errors import EventSinkError
from offline.online.event_source import EventBatch

COLUMNS = ("session_id", "item_id", "timestamp", "arm", "served_by")
FORMATS = (".csv", ".parquet")


def click_log(batch: EventBatch) -> pl.DataFrame:
    rows = [e for e in batch.events if not e.get("duplicate")]
    return pl.DataFrame(
        {
            "session_id": [str(e["session_id"]) for e in rows],
            "item_id": [str(e["item_id"]) for e in rows],
            "timestamp": [int(round(float(e["t"]) * 1000)) for e in rows],
            "arm": [e.get("arm") or "" for e in rows],
            "served_by": [str(e.get("served_by") or "") for e in rows],
        },
        schema={"session_id": pl.String, "item_id": pl.String, "timestamp": pl.Int64, "arm": pl.String, "served_by": pl.String},
    )


def write_click_log(frame: pl.DataFrame, out: Path) -> None:
    suffix = Path(out).suffix.lower()
    if suffix not in FORMATS:
        raise EventSinkError(f"--out {str(out)!r}: name a .csv or .parquet file")
    try:
        Path(out).parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(out).with_name(f".{Path(out).name}.partial")
        (frame.write_csv if suffix == ".csv" else frame.write_parquet)(tmp)
        tmp.replace(out)
    except OSError as exc:
        raise EventSinkError(f"--out {str(out)!r}: cannot write ({exc.strerror or exc})") from None
