"""The ingest behind `cairn prepare`: a raw click log in, train/valid/test sessions out.

One click per row (CSV, TSV or Parquet). The user names the columns; sessions come either from a
session column or from a visitor column cut at inactivity gaps. Then the protocol published with
the GRU recommender (Hidasi et al., ICLR 2016, "Session-based recommendations with recurrent neural
networks", section 4.1): drop sessions of length 1 and items clicked fewer than 5 times, repeated
here until neither removes anything; hold out the sessions that start in the last day as test and
the day before as validation; keep only valid/test clicks on training items and valid/test sessions
still of length 2 or more. Every step's removals go into a `PrepareReport`.

Decisions a user may want to know:
- Rows are numbered from 1, the header not counted (row 1 is line 2 of a CSV file).
- Times are kept in epoch milliseconds while sorting, so clicks in one second keep their order;
  equal times keep file order. The prepared data stores epoch seconds (floor).
- ISO 8601 times without an offset are taken as UTC; those with one are converted to UTC.
- A visitor's clicks split into a new session only when the pause is strictly longer than the gap
  (a pause of exactly 30 minutes stays in the session).
- The split is by session start against the last click time T of the filtered log: test starts at
  or after T - test_days, validation at or after T - test_days - valid_days, train before that.
- The item vocabulary is the training items, indexed in the sorted order of their ids, so the
  index does not depend on the order of the log's rows.

The heavy work is polars: the file is streamed once into three compact columns (session key and
item as integer codes, time as int64), and everything after works on those, never row by row.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import asdict
from pathlib import Path


from service.errors import InputDataError
from offline.data.dataset import PreparedData

from offline.data.prepare_options import FORMATS, REPORT_FILE, TIME_UNITS, PrepareOptions, PrepareReport, StepCount
from offline.data.read_clicks import read_clicks, resolve_format
from offline.data.sessions import filter_until_stable, n_sessions, sessionise, split_by_time

__all__ = [
    "FORMATS",
    "TIME_UNITS",
    "REPORT_FILE",
    "PrepareOptions",
    "StepCount",
    "PrepareReport",
    "prepare",
    "write_prepared",
    "prepare_to_folder",
]


# ---------------------------------------------------------------------------------------------
# Public entry points


def prepare(options: PrepareOptions) -> tuple[PreparedData, PrepareReport]:
    """Read, sessionise, filter and split a click log; raises InputDataError on anything unusable."""
    _check_options(options)
    path = Path(options.input)
    fmt = resolve_format(path, options.format)
    df, unit = read_clicks(path, fmt, options)
    key_col = options.session_column or options.visitor_column
    if options.visitor_column is not None:
        gap = f"{options.session_gap_minutes:g} min"
        sessions_from = f"visitor column '{options.visitor_column}', new session after a pause > {gap}"
    else:
        sessions_from = f"session column '{options.session_column}'"
    report = PrepareReport(
        input=str(path), format=fmt, time_unit=unit, sessions_from=sessions_from,
        options={k: (str(v) if isinstance(v, Path) else v) for k, v in asdict(options).items()},
    )
    gap_ms = None if options.visitor_column is None else int(round(options.session_gap_minutes * 60_000))
    df = sessionise(df, gap_ms)  # columns session (u32, start order), item (categorical), t (i64 ms)
    report.steps.append(StepCount(f"read {path.name} (sessions from '{key_col}')", 0, 0, df.height, n_sessions(df)))

    df = filter_until_stable(df, options, report, path)
    data = split_by_time(df, options, report, path)
    report.n_items = data.n_items
    report.fingerprint = data.fingerprint()
    return data, report


def write_prepared(data: PreparedData, report: PrepareReport, out: Path) -> None:
    """Save into a hidden sibling folder, then rename it into place: `out` is whole or untouched."""
    out = Path(out)
    _check_out(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:
        raise InputDataError(f"{out}: cannot create the output folder (--out): {exc.strerror}") from exc
    try:
        data.save(tmp)
        (tmp / REPORT_FILE).write_text(json.dumps(report.to_dict(), indent=2) + "\n", encoding="utf-8")
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
            os.replace(out, old)  # onto an empty folder: allowed by rename(2)
            try:
                os.replace(tmp, out)
            except BaseException:
                os.replace(old, out)
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, out)
    except OSError as exc:
        raise InputDataError(f"{out}: cannot write the prepared data (--out): {exc.strerror or exc}") from exc
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def prepare_to_folder(options: PrepareOptions, out: Path) -> PrepareReport:
    """`prepare` then `write_prepared`; checks `out` first so a bad --out fails before the work."""
    _check_out(Path(out))
    data, report = prepare(options)
    write_prepared(data, report, out)
    return report


# ---------------------------------------------------------------------------------------------
# Options and output folder


def _check_options(o: PrepareOptions) -> None:
    if (o.session_column is None) == (o.visitor_column is None):
        raise InputDataError("give exactly one of --session-column or --visitor-column")
    if o.time_unit not in TIME_UNITS:
        raise InputDataError(f"unknown --time-unit '{o.time_unit}'; choose one of {', '.join(TIME_UNITS)}")
    if not o.session_gap_minutes > 0:
        raise InputDataError(f"--session-gap-minutes must be above 0, got {o.session_gap_minutes:g}")
    if o.min_session_length < 2:
        raise InputDataError(
            f"--min-session-length must be at least 2 (a single click has nothing to predict), got {o.min_session_length}"
        )
    if o.min_item_clicks < 1:
        raise InputDataError(f"--min-item-clicks must be at least 1, got {o.min_item_clicks}")
    if not o.test_days > 0:
        raise InputDataError(f"--test-days must be above 0, got {o.test_days:g}")
    if not o.valid_days >= 0:
        raise InputDataError(f"--valid-days must be 0 or more, got {o.valid_days:g}")


def _check_out(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise InputDataError(f"{out}: exists and is not a folder (--out)")
    if out.is_dir() and any(out.iterdir()) and not (out / REPORT_FILE).exists():
        # Only a folder this command wrote is replaced; anything else may be someone's files.
        raise InputDataError(f"{out}: exists and does not hold a prepared data set (no {REPORT_FILE}); choose another --out")


