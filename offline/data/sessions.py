"""Cut clicks into sessions, filter them until stable, and split them by time (the published
protocol; see offline/data/prepare.py)."""

from __future__ import annotations

import itertools
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from service.errors import InputDataError
from offline.data.dataset import PreparedData, SessionSplit
from offline.data.prepare_options import PrepareOptions, PrepareReport, StepCount

_DAY_MS = 86_400_000


def sessionise(df: pl.DataFrame, gap_ms: int | None) -> pl.DataFrame:
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


def n_sessions(df: pl.DataFrame) -> int:
    # Sessions are contiguous runs of one id, so counting the changes is enough.
    if df.height == 0:
        return 0
    s = df["session"]
    return int((s != s.shift(1)).sum()) + 1


def filter_until_stable(df: pl.DataFrame, o: PrepareOptions, report: PrepareReport, path: Path) -> pl.DataFrame:
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
                    f"in {n_sessions(df):,} sessions); lower --min-item-clicks or --min-session-length, or use a larger log"
                )
            df = kept
        if report.steps[-1].rows_removed == 0:  # the item step changed nothing: session lengths hold too
            return df
    raise AssertionError("unreachable")


def split_by_time(df: pl.DataFrame, o: PrepareOptions, report: PrepareReport, path: Path) -> PreparedData:
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
        report.steps.append(StepCount(f"split by start time: {name}", 0, 0, p.height, n_sessions(p)))
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
    before, left = n_sessions(df), n_sessions(kept)
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

