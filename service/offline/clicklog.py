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

import codecs
import itertools
import json
import os
import re
import shutil
import tempfile
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from service.errors import InputDataError
from service.offline.dataset import PreparedData, SessionSplit

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

FORMATS = ("auto", "csv", "tsv", "parquet")
TIME_UNITS = ("auto", "s", "ms", "iso")
REPORT_FILE = "prepare_report.json"
_SUFFIX_FORMATS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".parquet": "parquet", ".pq": "parquet"}
# Epoch seconds stay below 1e11 until the year 5138; epoch milliseconds exceed it after March 1973.
_MS_THRESHOLD = 1e11
_DAY_MS = 86_400_000
_NUMBER = re.compile(r"^\s*[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?\s*$")
# The ISO 8601 forms read without the slow fallback; the first non-empty value picks one of them.
_ISO = re.compile(
    r"^\d{4}-\d{2}-\d{2}(?:(?P<sep>[T ])\d{2}:\d{2}(?P<sec>:\d{2}(?:\.\d+)?)?(?P<tz>[Zz]|[+-]\d{2}(?::?\d{2})?)?)?$"
)
# Tried in turn on the values the first-value format could not read (mixed forms in one log).
# `%#z` reads Z, +hh, +hhmm and +hh:mm; values without an offset are UTC.
_ISO_FALLBACK_TZ = ("%Y-%m-%d %H:%M:%S%.f%#z", "%Y-%m-%d %H:%M%#z")
_ISO_FALLBACK_NAIVE = ("%Y-%m-%d %H:%M:%S%.f", "%Y-%m-%d %H:%M", "%Y-%m-%d")


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


# ---------------------------------------------------------------------------------------------
# Public entry points


def prepare(options: PrepareOptions) -> tuple[PreparedData, PrepareReport]:
    """Read, sessionise, filter and split a click log; raises InputDataError on anything unusable."""
    _check_options(options)
    path = Path(options.input)
    fmt = _resolve_format(path, options.format)
    df, unit = _read_clicks(path, fmt, options)
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
    df = _sessionise(df, gap_ms)  # columns session (u32, start order), item (categorical), t (i64 ms)
    report.steps.append(StepCount(f"read {path.name} (sessions from '{key_col}')", 0, 0, df.height, _n_sessions(df)))

    df = _filter_until_stable(df, options, report, path)
    data = _split_by_time(df, options, report, path)
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


def _resolve_format(path: Path, fmt: str) -> str:
    if fmt not in FORMATS:
        raise InputDataError(f"{path}: unknown --format '{fmt}'; choose one of {', '.join(FORMATS)}")
    if not path.exists():
        raise InputDataError(f"{path}: no such file (--input)")
    if not path.is_file():
        raise InputDataError(f"{path}: not a file (--input)")
    if fmt != "auto":
        return fmt
    found = _SUFFIX_FORMATS.get(path.suffix.lower())
    if found is None:
        raise InputDataError(
            f"{path}: cannot tell the format from the suffix '{path.suffix}'; pass --format csv, tsv or parquet"
        )
    return found


# ---------------------------------------------------------------------------------------------
# Reading


def _scan(path: Path, fmt: str) -> pl.LazyFrame:
    if fmt == "parquet":
        return pl.scan_parquet(path)
    # Every CSV/TSV column is read as text: item ids stay strings ("007" is not 7), and the time
    # column is parsed here, with errors that name the row.
    # TSV has no quoting: its fields cannot hold a tab (IANA text/tab-separated-values).
    sep, quote = (",", '"') if fmt == "csv" else ("\t", None)
    return pl.scan_csv(path, separator=sep, quote_char=quote, infer_schema=False, raise_if_empty=True)


def _polars_error(path: Path, fmt: str, exc: Exception) -> InputDataError:
    """Translate a polars failure into one line naming the file (and the row, for bad UTF-8)."""
    if isinstance(exc, pl.exceptions.NoDataError):
        return InputDataError(f"{path}: the file is empty")
    msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    if fmt != "parquet" and "utf-8" in msg.lower():
        found = _first_invalid_utf8(path, "," if fmt == "csv" else "\t")
        if found is not None:
            return InputDataError(found)
    return InputDataError(f"{path}: cannot be read as {fmt.upper()}: {msg}")


def _first_invalid_utf8(path: Path, sep: str) -> str | None:
    """Message for the first byte that is not UTF-8: its row, column and value. Error path only."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    newlines = 0
    with open(path, "rb") as f:
        while chunk := f.read(1 << 20):
            try:
                decoder.decode(chunk)
            except UnicodeDecodeError as exc:
                # exc.object is the decoder's carried-over bytes (never a newline) plus this chunk.
                line = newlines + exc.object.count(b"\n", 0, exc.start) + 1
                bad = exc.object[exc.start : exc.end]
                break
            newlines += chunk.count(b"\n")
        else:
            return None
    with open(path, "rb") as f:
        for i, raw in enumerate(f, start=1):
            if i == line:
                break
        f.seek(0)
        header = f.readline().decode("utf-8", "replace").rstrip("\r\n").split(sep)
    try:
        raw.decode("utf-8")
        column = ""
    except UnicodeDecodeError as exc:
        index = raw[: exc.start].count(sep.encode())
        column = f", column '{header[index]}'" if line > 1 and index < len(header) else ""
    where = "the header line" if line == 1 else f"row {line - 1} (line {line}){column}"
    return f"{path}: {where} is not valid UTF-8 (bytes {bad.hex(' ')}); save the file as UTF-8"


def _read_clicks(path: Path, fmt: str, o: PrepareOptions) -> tuple[pl.DataFrame, str]:
    """Stream the file into columns key (integer), item (categorical), t (int64 epoch ms)."""
    key_col = o.session_column or o.visitor_column
    assert key_col is not None
    lf = _scan(path, fmt)
    try:
        schema = lf.collect_schema()
    except Exception as exc:  # polars raises several unrelated types for unreadable files
        raise _polars_error(path, fmt, exc) from exc
    flags = [
        ("--session-column" if o.session_column else "--visitor-column", key_col),
        ("--item-column", o.item_column),
        ("--time-column", o.time_column),
    ]
    for flag, name in flags:
        if name not in schema:
            have = ", ".join("'" + c.replace("\t", "\\t") + "'" for c in schema.names())  # a tab shown as \t
            hint = ""
            if fmt != "parquet" and len(schema) == 1 and any(s in schema.names()[0] for s in "\t;|,"):
                hint = "; the header looks separated by another character (try --format csv or tsv)"
            raise InputDataError(f"{path}: no column '{name}' ({flag}); the file has columns {have}{hint}")

    time_dtype = schema[o.time_column]
    key_dtype = schema[key_col]
    time_kind, detail = _time_kind(lf, path, fmt, o.time_column, time_dtype, o.time_unit)
    key = pl.col(key_col)
    key = key if key_dtype.is_integer() else key.cast(pl.String).cast(pl.Categorical(pl.Categories.random())).to_physical()
    item = pl.col(o.item_column).cast(pl.String).cast(pl.Categorical(pl.Categories.random()))
    t_raw = pl.col(o.time_column)
    unit = detail  # for numbers: s, ms or auto (resolved below); else what the log held
    if time_kind == "datetime":
        t = t_raw.cast(pl.Datetime("ms")).dt.epoch("ms") if time_dtype == pl.Date else t_raw.dt.epoch("ms")
    elif time_kind == "iso":
        t = _iso_primary(t_raw, detail)  # detail: the strptime format the first value has
        unit = "iso"
    elif time_kind == "number":
        t = t_raw if time_dtype.is_numeric() else t_raw.str.strip_chars().cast(pl.Float64, strict=False)
    else:
        raise AssertionError(time_kind)
    try:
        df = lf.select(key=key, item=item, t=t).collect(engine="streaming")
    except Exception as exc:
        raise _polars_error(path, fmt, exc) from exc
    if df.height == 0:
        raise InputDataError(f"{path}: has a header but no rows")

    for col, (flag, name) in zip(("key", "item"), flags[:2]):
        if df[col].null_count():
            row = int(df[col].is_null().arg_true()[0]) + 1
            raise InputDataError(f"{path}: row {row}, column '{name}' ({flag}): empty value")
    if time_kind == "iso" and df["t"].null_count():
        df = df.with_columns(t=_iso_fallback(lf, path, fmt, o.time_column, df["t"]))
    elif time_kind == "number":
        df, unit = _number_to_ms(df, lf, path, o.time_column, unit)
    elif df["t"].null_count():
        row = int(df["t"].is_null().arg_true()[0]) + 1
        raise InputDataError(f"{path}: row {row}, column '{o.time_column}' (--time-column): empty value")
    return df, unit


def _time_kind(lf: pl.LazyFrame, path: Path, fmt: str, col: str, dtype: pl.DataType, unit: str) -> tuple[str, str]:
    """How to read the time column: ('datetime', 'datetime'), ('iso', strptime format) or ('number', unit)."""
    where = f"{path}: column '{col}' (--time-column)"
    if dtype.is_temporal():
        if dtype not in (pl.Date,) and not isinstance(dtype, pl.Datetime):
            raise InputDataError(f"{where} holds {dtype}, not timestamps")
        if unit in ("s", "ms"):
            raise InputDataError(f"{where} already holds datetimes; use --time-unit auto or iso, not {unit}")
        return "datetime", "datetime"
    if dtype.is_numeric():
        if unit == "iso":
            raise InputDataError(f"{where} holds numbers, not ISO 8601 text; use --time-unit s, ms or auto")
        return "number", unit
    if dtype != pl.String:
        raise InputDataError(f"{where} holds {dtype}, not timestamps")
    try:
        # Usually the first rows decide; only a column that starts empty needs a longer look.
        head = lf.head(1000).select(pl.col(col)).collect()
        values = head.get_column(col).drop_nulls()
        if values.len() == 0:
            values = lf.select(pl.col(col)).drop_nulls().head(1).collect(engine="streaming").get_column(col)
    except Exception as exc:
        raise _polars_error(path, fmt, exc) from exc
    if values.len() == 0:
        if head.height == 0:
            raise InputDataError(f"{path}: has a header but no rows")
        raise InputDataError(f"{where}: every value is empty")
    value = str(values[0]).strip()
    if unit in ("s", "ms"):
        return "number", unit
    if unit == "auto" and _NUMBER.match(value):
        return "number", "auto"
    m = _ISO.match(value)
    if m is None:
        hint = "; for epoch numbers use --time-unit s or ms" if _NUMBER.match(value) else ""
        row = lf.select(pl.col(col).is_not_null().arg_true().first()).collect().item() + 1  # error path only
        raise InputDataError(f"{where}: row {row} has '{value}', not an ISO 8601 timestamp like 2014-04-07T10:51:09Z{hint}")
    fmt_s = "%Y-%m-%d"
    if m.group("sep"):
        fmt_s += m.group("sep") + "%H:%M" + (":%S%.f" if m.group("sec") else "") + ("%#z" if m.group("tz") else "")
    return "iso", fmt_s


def _iso_primary(col: pl.Expr, fmt_s: str) -> pl.Expr:
    aware = fmt_s.endswith("%#z")
    dtype = pl.Datetime("ms", "UTC") if aware else pl.Datetime("ms")
    return col.str.strptime(dtype, fmt_s, strict=False).dt.epoch("ms")  # naive -> read as UTC


def _iso_fallback(lf: pl.LazyFrame, path: Path, fmt: str, col: str, t: pl.Series) -> pl.Series:
    """Re-read only the rows the first-value format missed, trying every accepted ISO 8601 form."""
    missed = t.is_null().arg_true()  # u32 [m], row positions
    norm = pl.col(col).str.strip_chars().str.replace("T", " ", literal=True)
    tries = [norm.str.strptime(pl.Datetime("ms", "UTC"), f, strict=False).dt.epoch("ms") for f in _ISO_FALLBACK_TZ]
    tries += [norm.str.strptime(pl.Datetime("ms"), f, strict=False).dt.epoch("ms") for f in _ISO_FALLBACK_NAIVE]
    try:
        fixed = (
            lf.select(pl.col(col)).with_row_index("row")
            .filter(pl.col("row").is_in(missed.implode()))
            .select("row", pl.col(col).alias("raw"), pl.coalesce(tries).alias("t"))
            .collect(engine="streaming")
            .sort("row")
        )
    except Exception as exc:
        raise _polars_error(path, fmt, exc) from exc
    bad = fixed.filter(pl.col("t").is_null())
    if bad.height:
        row, raw = int(bad["row"][0]) + 1, bad["raw"][0]
        what = "empty value" if raw is None else f"'{raw}' is not an ISO 8601 timestamp"
        raise InputDataError(f"{path}: row {row}, column '{col}' (--time-column): {what}")
    return t.scatter(fixed["row"], fixed["t"])


def _number_to_ms(df: pl.DataFrame, lf: pl.LazyFrame, path: Path, col: str, unit: str) -> tuple[pl.DataFrame, str]:
    where = f"column '{col}' (--time-column)"
    x = df["t"]
    bad = x.is_null() | ~x.is_finite() if x.dtype.is_float() else x.is_null()
    if bad.any():
        row = int(bad.arg_true()[0])
        raw = lf.select(pl.col(col)).slice(row, 1).collect().item()
        unit_name = {"s": "seconds", "ms": "milliseconds"}.get(unit, "seconds or milliseconds")
        what = "empty value" if raw is None else f"'{raw}' is not a number of epoch {unit_name}"
        raise InputDataError(f"{path}: row {row + 1}, {where}: {what}")
    if unit == "auto":
        lo, hi = x.min(), x.max()
        if hi < _MS_THRESHOLD:
            unit = "s"
        elif lo >= _MS_THRESHOLD:
            unit = "ms"
        else:
            r_ms = int((x >= _MS_THRESHOLD).arg_true()[0]) + 1
            r_s = int((x < _MS_THRESHOLD).arg_true()[0]) + 1
            raise InputDataError(
                f"{path}: {where} mixes epoch milliseconds (row {r_ms}: {x[r_ms - 1]:.15g}) and seconds "
                f"(row {r_s}: {x[r_s - 1]:.15g}); pass --time-unit s or ms"
            )
    scale = 1000 if unit == "s" else 1
    if x.dtype.is_integer():
        t = x.cast(pl.Int64) * scale
    else:
        t = (x.cast(pl.Float64) * scale).round().cast(pl.Int64)
    return df.with_columns(t=t), unit


# ---------------------------------------------------------------------------------------------
# Sessions and the filtering protocol


def _sessionise(df: pl.DataFrame, gap_ms: int | None) -> pl.DataFrame:
    """Number sessions 0.. in order of start time; clicks in time order, ties in file order.

    gap_ms None: one session per key. Otherwise the key is a visitor, whose clicks start a new
    session after a pause strictly longer than gap_ms.
    """
    df = df.with_row_index("row")  # file position: breaks ties between sessions starting together
    if gap_ms is None:
        df = df.with_columns(start=pl.col("t").min().over("key"), first=pl.col("row").min().over("key"))
    else:
        df = df.sort(["key", "t"], maintain_order=True)
        new = (pl.col("key") != pl.col("key").shift(1)) | ((pl.col("t") - pl.col("t").shift(1)) > gap_ms)
        new = new.fill_null(True)  # the first row starts a session
        df = df.with_columns(
            start=pl.when(new).then(pl.col("t")).forward_fill(),
            first=pl.when(new).then(pl.col("row")).forward_fill(),
        )
    # maintain_order: equal times keep file order (the frame is in file order, or sorted stably).
    df = df.select("start", "first", "t", "item").sort(["start", "first", "t"], maintain_order=True)
    session = (pl.col("first") != pl.col("first").shift(1)).fill_null(True).cum_sum() - 1
    return df.select(session=session.cast(pl.UInt32), item="item", t="t")


def _n_sessions(df: pl.DataFrame) -> int:
    # Sessions are contiguous runs of one id, so counting the changes is enough.
    if df.height == 0:
        return 0
    s = df["session"]
    return int((s != s.shift(1)).sum()) + 1


def _filter_until_stable(df: pl.DataFrame, o: PrepareOptions, report: PrepareReport, path: Path) -> pl.DataFrame:
    """Hidasi et al. 2016 filters, repeated until a round removes nothing (each can undo the other)."""
    for round_ in itertools.count(1):
        steps = (
            (f"drop sessions shorter than {o.min_session_length} (round {round_})",
             pl.len().over("session") >= o.min_session_length),
            (f"drop items with fewer than {o.min_item_clicks} clicks (round {round_})",
             pl.len().over("item") >= o.min_item_clicks),
        )
        for name, keep in steps:
            kept = _apply(df, keep, name, report)
            if kept.height == 0:
                raise InputDataError(
                    f"{path}: no sessions left after step '{name}' (it removed the last {df.height:,} clicks "
                    f"in {_n_sessions(df):,} sessions); lower --min-item-clicks or --min-session-length, or use a larger log"
                )
            df = kept
        if report.steps[-1].rows_removed == 0:  # the item step changed nothing: session lengths hold too
            return df
    raise AssertionError("unreachable")


def _split_by_time(df: pl.DataFrame, o: PrepareOptions, report: PrepareReport, path: Path) -> PreparedData:
    t_last = int(df["t"].max())
    test_cut = t_last - int(round(o.test_days * _DAY_MS))
    valid_cut = test_cut - int(round(o.valid_days * _DAY_MS))
    # Sessions are contiguous and in time order: a session's start is the time of its first row.
    first_row = (pl.col("session") != pl.col("session").shift(1)).fill_null(True)
    start = pl.when(first_row).then(pl.col("t")).forward_fill()
    df = df.with_columns(part=pl.when(start >= test_cut).then(2).when(start >= valid_cut).then(1).otherwise(0).cast(pl.Int8))
    parts = {name: df.filter(pl.col("part") == k).drop("part") for k, name in enumerate(("train", "valid", "test"))}
    span_days = (t_last - int(df["t"].min())) / _DAY_MS
    for k, name in enumerate(("train", "valid", "test")):
        p = parts[name]
        report.steps.append(StepCount(f"split by start time: {name}", 0, 0, p.height, _n_sessions(p)))
    if parts["train"].height == 0:
        raise InputDataError(
            f"{path}: the time split leaves no training sessions: the filtered log spans {span_days:.2f} days "
            f"and the last {o.test_days:g} + {o.valid_days:g} days go to test and validation; "
            "lower --test-days/--valid-days or use a longer log"
        )

    # The vocabulary: training items, indexed in sorted order of their ids.
    train_items = parts["train"]["item"].unique()
    ids = train_items.cast(pl.String).to_numpy()
    order = np.argsort(ids, kind="stable")
    codes = train_items.to_physical().to_numpy()
    n_codes = int(df["item"].to_physical().max()) + 1
    lut = np.full(n_codes, -1, dtype=np.int32)  # categorical code -> vocabulary index
    lut[codes[order]] = np.arange(len(order), dtype=np.int32)
    item_ids = [str(x) for x in ids[order]]

    splits: dict[str, SessionSplit] = {}
    for name in ("train", "valid", "test"):
        p = parts[name].with_columns(index=pl.Series(lut[parts[name]["item"].to_physical().to_numpy()]))
        if name != "train":
            p = _apply(p, pl.col("index") >= 0, f"{name}: drop clicks on items not in training", report)
            short = pl.len().over("session") >= o.min_session_length
            p = _apply(p, short, f"{name}: drop sessions shorter than {o.min_session_length}", report)
            if p.height == 0 and (name == "test" or o.valid_days > 0):
                flag, days = ("--test-days", o.test_days) if name == "test" else ("--valid-days", o.valid_days)
                skip = "; --valid-days 0 skips validation" if name == "valid" else ""
                raise InputDataError(
                    f"{path}: no {name} sessions left after the time split and its filters ({flag} {days:g} of a log "
                    f"spanning {span_days:.2f} days); raise {flag} or use a longer log{skip}"
                )
        splits[name] = _to_split(p)
        report.splits[name] = _split_summary(p, splits[name])
    return PreparedData(train=splits["train"], valid=splits["valid"], test=splits["test"], item_ids=item_ids)


def _apply(df: pl.DataFrame, keep: pl.Expr, step: str, report: PrepareReport) -> pl.DataFrame:
    """Keep the rows where `keep` holds and record what the step removed."""
    kept = df.filter(keep)
    before, left = _n_sessions(df), _n_sessions(kept)
    report.steps.append(StepCount(step, df.height - kept.height, before - left, kept.height, left))
    return kept


def _to_split(p: pl.DataFrame) -> SessionSplit:
    session = p["session"].to_numpy()
    if len(session) == 0:
        return SessionSplit(items=np.zeros(0, np.int32), offsets=np.zeros(1, np.int64), times=np.zeros(0, np.int64))
    starts = np.flatnonzero(np.concatenate([[True], session[1:] != session[:-1]]))  # [n_sessions]
    offsets = np.concatenate([starts, [len(session)]]).astype(np.int64)  # [n_sessions + 1]
    items = p["index"].to_numpy().astype(np.int32)  # [n_clicks]
    times = np.floor_divide(p["t"].to_numpy(), 1000).astype(np.int64)  # [n_clicks], epoch s
    return SessionSplit(items=items, offsets=offsets, times=times)


def _split_summary(p: pl.DataFrame, s: SessionSplit) -> dict[str, Any]:
    def iso(ms: int) -> str:
        return datetime.fromtimestamp(ms / 1000, tz=timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")

    first_ms = p["t"].gather(s.offsets[:-1]) if s.n_sessions else None
    return {
        "sessions": s.n_sessions,
        "clicks": s.n_clicks,
        "items": int(len(np.unique(s.items))),
        "first_start": iso(int(first_ms.min())) if first_ms is not None else None,
        "last_start": iso(int(first_ms.max())) if first_ms is not None else None,
    }
