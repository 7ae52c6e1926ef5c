"""`cairn events export --from SINK --out clicks.csv|.parquet`: the click events as a click log."""

from __future__ import annotations

import argparse
from pathlib import Path

from offline.online.event_source import read_events
from offline.online.export import FORMATS, click_log, write_click_log
from service.errors import EventSinkError


def configure(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION")
    sub.required = True
    export = sub.add_parser("export", help="write the events as a click log `cairn prepare` reads",
                            description="write the events as a click log `cairn prepare` reads")  # fmt: skip
    export.add_argument("--from", dest="source", required=True, help="the sink: the events folder, or the redis:// URL")
    export.add_argument("--out", type=Path, required=True, help="clicks.csv or clicks.parquet")
    export.add_argument("--redis-prefix", default="cairn:", help="with a redis:// sink: the service's CAIRN_REDIS_PREFIX (default cairn:)")


def run(args: argparse.Namespace) -> int:
    if Path(args.out).suffix.lower() not in FORMATS:  # before reading what may be a large log
        raise EventSinkError(f"--out {str(args.out)!r}: name a .csv or .parquet file")
    batch = read_events(args.source, args.redis_prefix)
    frame = click_log(batch)
    write_click_log(frame, args.out)
    skipped = f", {batch.skipped} unreadable lines skipped" if batch.skipped else ""
    print(f"wrote {frame.height} clicks of {frame['session_id'].n_unique()} visits to {args.out} (from {batch.source}{skipped})")
    print(f"next: cairn prepare --input {args.out} --out DIR --session-column session_id --item-column item_id --time-column timestamp")
    return 0
