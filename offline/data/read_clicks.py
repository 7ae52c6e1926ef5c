"""Read one click log (CSV, TSV or Parquet) into three compact columns: session key, item, time.

The file is streamed once by polars; a bad file, column or value is an InputDataError naming the
file, the column and the row (rows are numbered from 1, the header not counted). Times become epoch
milliseconds: numbers in seconds or milliseconds (told apart by size unless --time-unit says), or
ISO 8601 text (without an offset taken as UTC).
"""

from __future__ import annotations

import codecs
import re
from pathlib import Path

import polars as pl

from service.errors import InputDataError
from offline.data.prepare_options import FORMATS, PrepareOptions

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


def resolve_format(path: Path, fmt: str) -> str:
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


def read_clicks(path: Path, fmt: str, o: PrepareOptions) -> tuple[pl.DataFrame, str]:
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


