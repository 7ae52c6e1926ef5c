"""`cairn prepare`: a raw click log in, a prepared data set (train/valid/test sessions) out."""

from __future__ import annotations

import argparse
from pathlib import Path

from offline.data.prepare import FORMATS, REPORT_FILE, TIME_UNITS, PrepareOptions, prepare_to_folder


def configure(parser: argparse.ArgumentParser) -> None:
    io = parser.add_argument_group("input and output")
    io.add_argument("--input", type=Path, required=True, help="the click log: one click per row")
    io.add_argument("--out", type=Path, required=True,
                    help="folder to write the prepared data set into (an existing one is replaced only on success)")
    # No argparse `choices` for --format/--time-unit: the ingest checks them, so a bad value reads
    # as one cairn error line like every other input problem.
    io.add_argument("--format", default="auto", help=f"{'|'.join(FORMATS)} (default auto: by the file suffix)")

    cols = parser.add_argument_group("columns")
    cols.add_argument("--session-column", help="column holding the session id")
    cols.add_argument("--visitor-column",
                      help="instead of --session-column: cut each visitor's clicks into sessions at pauses")
    cols.add_argument("--item-column", required=True, help="column holding the clicked item id (kept as text)")
    cols.add_argument("--time-column", required=True, help="column holding the click time")
    cols.add_argument(
        "--time-unit", default="auto",
        help=f"{'|'.join(TIME_UNITS)}: epoch seconds, epoch milliseconds or ISO 8601 text "
        "(default auto: numbers above 1e11 are milliseconds, text is ISO 8601)",
    )
    cols.add_argument(
        "--session-gap-minutes", type=float, default=30.0,
        help="with --visitor-column: a pause longer than this starts a new session (default 30)",
    )

    proto = parser.add_argument_group("filtering and time split (Hidasi et al. 2016)")
    proto.add_argument("--min-session-length", type=int, default=2, help="drop sessions with fewer clicks (default 2)")
    proto.add_argument("--min-item-clicks", type=int, default=5, help="drop items with fewer clicks (default 5)")
    proto.add_argument("--test-days", type=float, default=1.0,
                       help="sessions starting in the last N days are the test set (default 1)")
    proto.add_argument("--valid-days", type=float, default=1.0,
                       help="sessions starting in the N days before those are the validation set (default 1; 0: none)")


def run(args: argparse.Namespace) -> int:
    options = PrepareOptions(
        input=args.input,
        item_column=args.item_column,
        time_column=args.time_column,
        session_column=args.session_column,
        visitor_column=args.visitor_column,
        format=args.format,
        time_unit=args.time_unit,
        session_gap_minutes=args.session_gap_minutes,
        min_session_length=args.min_session_length,
        min_item_clicks=args.min_item_clicks,
        test_days=args.test_days,
        valid_days=args.valid_days,
    )
    report = prepare_to_folder(options, args.out)
    print(report.format_table())
    print(f"\nwrote {args.out} (report: {Path(args.out) / REPORT_FILE})")
    return 0
