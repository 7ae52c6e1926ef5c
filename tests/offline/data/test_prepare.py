"""The click-log ingest: sessionising, the published filtering protocol, time formats, bad input.

The protocol checked here is the one published with the GRU recommender (Hidasi et al., ICLR 2016,
"Session-based recommendations with recurrent neural networks", section 4.1): drop sessions of
length 1 and items with fewer than 5 clicks, test on the sessions of the last day, keep only test
clicks on training items and test sessions still of length >= 2. Expected counts are worked out by
hand in the comments.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from service.errors import InputDataError
from offline.data.prepare import REPORT_FILE, PrepareOptions, prepare, prepare_to_folder
from offline.data.dataset import PreparedData

DAY = 86_400
T0 = 1_700_000_000  # 2023-11-14T22:13:20Z, the log's first second

# The hand-made log: (session id, item, seconds after T0). Ids are not in start order, and the
# file is written in reverse, so the order of the output cannot come from the order of the input.
#   T_last = 176400 (e4's last click); test cut = T_last - 1 day = 90000; valid cut = 3600.
PROTOCOL_LOG = [
    # train: sessions starting before 3600
    ("t1", "A", 0), ("t1", "B", 10), ("t1", "C", 20),
    ("t2", "B", 100), ("t2", "C", 110), ("t2", "A", 120), ("t2", "D", 130),
    ("t3", "C", 200), ("t3", "A", 210), ("t3", "B", 220), ("t3", "D", 230),
    ("t4", "A", 300), ("t4", "D", 310), ("t4", "B", 320),
    ("t5", "X", 400), ("t5", "D", 410),
    ("t6", "E", 500),
    # Starts 1 s before the valid cut: train. (The start is the first click the filters keep:
    # were D first, s0 would start at 3610 once D is gone, and be a validation session.)
    ("s0", "A", 3599), ("s0", "D", 3610), ("s0", "C", 3620),
    # valid: sessions starting in [3600, 90000)
    ("v1", "A", 3600), ("v1", "B", 3700),  # starts exactly at the valid cut: valid
    ("v2", "W", 40000), ("v2", "A", 40010), ("v2", "B", 40020),
    ("v3", "W", 41000), ("v3", "C", 41010),
    # test: sessions starting at or after 90000
    ("e1", "B", 90000), ("e1", "C", 90010), ("e1", "A", 90020),  # starts exactly at the test cut: test
    ("e2", "W", 100000), ("e2", "W", 100010), ("e2", "A", 100020),
    ("e3", "C", 150000), ("e3", "B", 150010), ("e3", "W", 150020),
    ("e4", "A", 176390), ("e4", "C", 176400),
]


def write_csv(path: Path, header: str, rows: list[tuple], sep: str = ",") -> Path:
    lines = [header.replace(",", sep)] + [sep.join(str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def options(path: Path, **kw) -> PrepareOptions:
    base = dict(input=path, session_column="session_id", item_column="item_id", time_column="timestamp")
    base.update(kw)
    return PrepareOptions(**base)


def protocol_csv(tmp_path: Path) -> Path:
    rows = [(s, i, T0 + t) for s, i, t in reversed(PROTOCOL_LOG)]
    return write_csv(tmp_path / "clicks.csv", "session_id,item_id,timestamp", rows)


def assert_nothing_written(out: Path) -> None:
    assert not out.exists()
    assert [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")] == []


# ---------------------------------------------------------------------------------------------
# The protocol


def test_published_protocol_counts_worked_by_hand(tmp_path: Path) -> None:
    data, report = prepare(options(protocol_csv(tmp_path)))
    steps = [(s.step, s.rows_removed, s.sessions_removed, s.rows_left, s.sessions_left) for s in report.steps]
    # 14 sessions, 38 rows: train 3+4+4+3+2+1+3 = 20, valid 2+3+2 = 7, test 3+3+3+2 = 11.
    # Round 1, sessions: t6 is the only session of length 1.
    # Round 1, items: X has 1 click (removed; t5 becomes [D]). D has 5 (t2 t3 t4 t5 s0): kept.
    #   W has 5 (v2 v3 e2 e2 e3): kept. A 10, B 8, C 8.
    # Round 2, sessions: t5 = [D] now has length 1: removed, so D is down to 4 clicks.
    # Round 2, items: D's 4 clicks go; t2 t3 t4 s0 keep >= 2 clicks, so no session vanishes.
    # Round 3 removes nothing: stable.
    assert steps[:7] == [
        ("read clicks.csv (sessions from 'session_id')", 0, 0, 38, 14),
        ("drop sessions shorter than 2 (round 1)", 1, 1, 37, 13),
        ("drop items with fewer than 5 clicks (round 1)", 1, 0, 36, 13),
        ("drop sessions shorter than 2 (round 2)", 1, 1, 35, 12),
        ("drop items with fewer than 5 clicks (round 2)", 4, 0, 31, 12),
        ("drop sessions shorter than 2 (round 3)", 0, 0, 31, 12),
        ("drop items with fewer than 5 clicks (round 3)", 0, 0, 31, 12),
    ]
    # Split by start: train t1 t2 t3 t4 s0 (3+3+3+2+2 = 13 clicks), valid v1 v2 v3 (2+3+2 = 7),
    # test e1 e2 e3 e4 (3+3+3+2 = 11). Training items: A B C, so W is unseen.
    # valid: W leaves v2 and v3 (2 rows); v3 = [C] is then too short (1 row, 1 session).
    # test: W leaves e2 twice and e3 once (3 rows); e2 = [A] is then too short.
    assert steps[7:] == [
        ("split by start time: train", 0, 0, 13, 5),
        ("split by start time: valid", 0, 0, 7, 3),
        ("split by start time: test", 0, 0, 11, 4),
        ("valid: drop clicks on items not in training", 2, 0, 5, 3),
        ("valid: drop sessions shorter than 2", 1, 1, 4, 2),
        ("test: drop clicks on items not in training", 3, 0, 8, 4),
        ("test: drop sessions shorter than 2", 1, 1, 7, 3),
    ]
    # Vocabulary in sorted id order; sessions in start order, clicks in time order.
    assert data.item_ids == ["A", "B", "C"]
    a, b, c = 0, 1, 2
    assert [s.tolist() for s in data.train.sessions()] == [[a, b, c], [b, c, a], [c, a, b], [a, b], [a, c]]
    assert [s.tolist() for s in data.valid.sessions()] == [[a, b], [a, b]]
    assert [s.tolist() for s in data.test.sessions()] == [[b, c, a], [c, b], [a, c]]
    assert data.train.times[:3].tolist() == [T0, T0 + 10, T0 + 20]
    assert data.test.times[-2:].tolist() == [T0 + 176390, T0 + 176400]
    assert report.splits["test"]["sessions"] == 3 and report.n_items == 3


def test_row_order_of_the_file_does_not_change_the_result(tmp_path: Path) -> None:
    forward = write_csv(tmp_path / "f.csv", "session_id,item_id,timestamp", [(s, i, T0 + t) for s, i, t in PROTOCOL_LOG])
    shuffled_rows = [PROTOCOL_LOG[k] for k in np.random.default_rng(3).permutation(len(PROTOCOL_LOG))]
    shuffled = write_csv(tmp_path / "s.csv", "session_id,item_id,timestamp", [(s, i, T0 + t) for s, i, t in shuffled_rows])
    a, _ = prepare(options(forward))
    b, _ = prepare(options(shuffled))
    assert a.fingerprint() == b.fingerprint()
    assert [s.tolist() for s in a.test.sessions()] == [s.tolist() for s in b.test.sessions()]


def test_equal_times_keep_file_order_and_item_ids_stay_text(tmp_path: Path) -> None:
    # Two clicks in the same second keep the order of the file; "007" stays "007", not 7.
    rows = [("a", "007", T0), ("a", "7", T0), ("a", "007", T0 + 1)] * 1
    rows += [("b", "7", T0 + 5), ("b", "007", T0 + 6)]
    rows += [("c", "7", T0 + 2 * DAY), ("c", "007", T0 + 2 * DAY + 1)]  # valid
    rows += [("d", "7", T0 + 3 * DAY), ("d", "007", T0 + 3 * DAY + 1)]  # test
    path = write_csv(tmp_path / "c.csv", "session_id,item_id,timestamp", rows)
    data, _ = prepare(options(path, min_item_clicks=1))
    assert data.item_ids == ["007", "7"]
    assert data.train.session(0).tolist() == [0, 1, 0]


def test_csv_quoting_crlf_and_byte_order_mark(tmp_path: Path) -> None:
    # RFC 4180: CRLF line breaks and a quoted field holding the separator; a UTF-8 byte order mark
    # before the header is not part of the first column's name.
    rows = [("a", '"Rake, steel"', T0), ("a", "Hoe", T0 + 1)]
    rows += [("b", "Hoe", T0 + 2 * DAY), ("b", '"Rake, steel"', T0 + 2 * DAY + 1)]
    rows += [("c", "Hoe", T0 + 3 * DAY), ("c", '"Rake, steel"', T0 + 3 * DAY + 1)]
    text = "\ufeffsession_id,item_id,timestamp\r\n" + "".join(f"{a},{b},{c}\r\n" for a, b, c in rows)
    path = tmp_path / "crlf.csv"
    path.write_bytes(text.encode("utf-8"))
    data, _ = prepare(options(path, min_item_clicks=1))
    assert data.item_ids == ["Hoe", "Rake, steel"]
    assert data.test.session(0).tolist() == [0, 1] and data.test.times.tolist() == [T0 + 3 * DAY, T0 + 3 * DAY + 1]


# ---------------------------------------------------------------------------------------------
# Visitors cut into sessions at pauses


def test_visitor_sessions_split_only_after_a_pause_longer_than_the_gap(tmp_path: Path) -> None:
    gap = 30 * 60
    rows = [
        # visitor u: pauses of 60 s, exactly 30 min (same session), 30 min + 1 s (new session)
        ("u", "A", 0), ("u", "B", 60), ("u", "C", 60 + gap), ("u", "A", 60 + gap + gap + 1), ("u", "B", 60 + 2 * gap + 61),
        # visitor w, interleaved in time with u: one session
        ("w", "C", 30), ("w", "A", 90),
        # valid and test days
        ("w", "A", 2 * DAY), ("w", "B", 2 * DAY + 10),
        ("u", "A", 3 * DAY), ("u", "C", 3 * DAY + 10),
    ]
    path = write_csv(tmp_path / "v.csv", "visitor,item_id,timestamp", [(v, i, T0 + t) for v, i, t in rows])
    data, report = prepare(options(path, session_column=None, visitor_column="visitor", min_item_clicks=1))
    a, b, c = 0, 1, 2
    # Start order: u's first session (0), w (30), u's second session (3661).
    assert [s.tolist() for s in data.train.sessions()] == [[a, b, c], [c, a], [a, b]]
    assert [s.tolist() for s in data.valid.sessions()] == [[a, b]]
    assert [s.tolist() for s in data.test.sessions()] == [[a, c]]
    assert report.steps[0].sessions_left == 5
    # A gap of 10 minutes cuts u's 30-minute pause as well: 6 sessions.
    _, report = prepare(options(path, session_column=None, visitor_column="visitor", min_item_clicks=1, session_gap_minutes=10))
    assert report.steps[0].sessions_left == 6


# ---------------------------------------------------------------------------------------------
# Time formats


def three_day_log(times: list) -> list[tuple]:
    """Sessions a (train), b (valid), c (test) with items A, B; `times` has 6 values."""
    return [(s, i, t) for (s, i), t in zip([("a", "A"), ("a", "B"), ("b", "A"), ("b", "B"), ("c", "A"), ("c", "B")], times)]


def all_times(data: PreparedData) -> list[int]:
    return data.train.times.tolist() + data.valid.times.tolist() + data.test.times.tolist()


EPOCHS = [T0, T0 + 61, T0 + 2 * DAY, T0 + 2 * DAY + 5, T0 + 3 * DAY, T0 + 3 * DAY + 7]


@pytest.mark.parametrize("unit", ["auto", "s"])
def test_epoch_seconds(tmp_path: Path, unit: str) -> None:
    path = write_csv(tmp_path / "s.csv", "session_id,item_id,timestamp", three_day_log(EPOCHS))
    data, report = prepare(options(path, min_item_clicks=1, time_unit=unit))
    assert report.time_unit == "s" and all_times(data) == EPOCHS


@pytest.mark.parametrize("unit", ["auto", "ms"])
def test_epoch_milliseconds(tmp_path: Path, unit: str) -> None:
    ms = [t * 1000 + 250 for t in EPOCHS]  # the 250 ms are floored away in the stored seconds
    path = write_csv(tmp_path / "ms.csv", "session_id,item_id,timestamp", three_day_log(ms))
    data, report = prepare(options(path, min_item_clicks=1, time_unit=unit))
    assert report.time_unit == "ms" and all_times(data) == EPOCHS


@pytest.mark.parametrize("unit", ["auto", "iso"])
def test_iso_8601_in_several_forms(tmp_path: Path, unit: str) -> None:
    # Expected values from Python's own ISO 8601 reader (datetime.fromisoformat); no offset = UTC.
    texts = [
        "2023-11-14T22:13:20Z",
        "2023-11-14 22:14:21",
        "2023-11-17T00:13:20+02:00",
        "2023-11-16T22:13:25.500Z",
        "2023-11-17T22:13:20.125+00:00",
        "2023-11-17T23:13:27+0100",
    ]

    def epoch(s: str) -> int:
        d = datetime.fromisoformat(s.replace("+0100", "+01:00"))
        d = d if d.tzinfo else d.replace(tzinfo=timezone.utc)
        return int(d.timestamp() // 1)

    path = write_csv(tmp_path / "iso.csv", "session_id,item_id,timestamp", three_day_log(texts))
    data, report = prepare(options(path, min_item_clicks=1, time_unit=unit))
    assert report.time_unit == "iso"
    assert all_times(data) == [epoch(s) for s in texts] == EPOCHS


def test_parquet_with_datetime_and_integer_columns(tmp_path: Path) -> None:
    log = three_day_log(EPOCHS)
    frame = pl.DataFrame(
        {
            "session_id": [100, 100, 200, 200, 300, 300],  # integers: sessions by value
            "item_id": [11, 22, 11, 22, 11, 22],  # integers: kept as text ids
            "timestamp": pl.Series([t * 1000 for _, _, t in log]).cast(pl.Datetime("ms", "UTC")),
            "epoch_ms": [t * 1000 for _, _, t in log],
        }
    )
    path = tmp_path / "clicks.parquet"
    frame.write_parquet(path)
    data, report = prepare(options(path, min_item_clicks=1))
    assert report.format == "parquet" and data.item_ids == ["11", "22"] and all_times(data) == EPOCHS
    data, report = prepare(options(path, min_item_clicks=1, time_column="epoch_ms"))
    assert report.time_unit == "ms" and all_times(data) == EPOCHS


def test_tsv_by_suffix_and_by_flag(tmp_path: Path) -> None:
    path = write_csv(tmp_path / "clicks.tsv", "session_id,item_id,timestamp", three_day_log(EPOCHS), sep="\t")
    data, report = prepare(options(path, min_item_clicks=1))
    assert report.format == "tsv" and all_times(data) == EPOCHS
    other = tmp_path / "clicks.log"
    other.write_bytes(path.read_bytes())
    _, report = prepare(options(other, min_item_clicks=1, format="tsv"))
    assert report.format == "tsv"


# ---------------------------------------------------------------------------------------------
# Bad input: one clear InputDataError, nothing written


def fails(opts: PrepareOptions, out: Path) -> str:
    with pytest.raises(InputDataError) as info:
        prepare_to_folder(opts, out)
    assert_nothing_written(out)
    message = str(info.value)
    assert "\n" not in message
    return message


def test_missing_column_lists_the_columns_the_file_has(tmp_path: Path) -> None:
    path = protocol_csv(tmp_path)
    msg = fails(options(path, item_column="item"), tmp_path / "out")
    assert str(path) in msg and "'item'" in msg and "--item-column" in msg
    assert "'session_id', 'item_id', 'timestamp'" in msg


def test_unparsable_timestamps_name_row_and_value(tmp_path: Path) -> None:
    texts = ["2023-11-14T22:13:20Z", "2023-11-14T22:14:20Z", "2023-11-16T22:13:20Z", "yesterday", "x", "y"]
    path = write_csv(tmp_path / "iso.csv", "session_id,item_id,timestamp", three_day_log(texts))
    msg = fails(options(path), tmp_path / "out")
    assert str(path) in msg and "row 4" in msg and "'timestamp'" in msg and "'yesterday'" in msg
    nums = [T0, T0 + 1, "17OO000000", T0 + 2, T0 + 3, T0 + 4]
    path = write_csv(tmp_path / "num.csv", "session_id,item_id,timestamp", three_day_log(nums))
    msg = fails(options(path), tmp_path / "out")
    assert "row 3" in msg and "'17OO000000'" in msg and "'timestamp'" in msg
    # Text that is not ISO 8601 from the first row on.
    path = write_csv(tmp_path / "us.csv", "session_id,item_id,timestamp", three_day_log(["11/14/2023 10:00"] * 6))
    msg = fails(options(path), tmp_path / "out")
    assert "row 1" in msg and "'11/14/2023 10:00'" in msg and "ISO 8601" in msg
    # Seconds and milliseconds mixed in one column.
    path = write_csv(tmp_path / "mix.csv", "session_id,item_id,timestamp", three_day_log([T0, T0 * 1000] + EPOCHS[2:]))
    msg = fails(options(path), tmp_path / "out")
    assert "row 2" in msg and "row 1" in msg and "milliseconds" in msg


def test_empty_file_and_header_only(tmp_path: Path) -> None:
    empty = tmp_path / "empty.csv"
    empty.write_bytes(b"")
    msg = fails(options(empty), tmp_path / "out")
    assert str(empty) in msg and "empty" in msg
    header = write_csv(tmp_path / "header.csv", "session_id,item_id,timestamp", [])
    msg = fails(options(header), tmp_path / "out")
    assert str(header) in msg and "no rows" in msg


def test_empty_cell_names_row_and_column(tmp_path: Path) -> None:
    rows = three_day_log(EPOCHS)
    rows[2] = ("b", "", rows[2][2])
    path = write_csv(tmp_path / "gap.csv", "session_id,item_id,timestamp", rows)
    msg = fails(options(path), tmp_path / "out")
    assert "row 3" in msg and "'item_id'" in msg and "empty" in msg


def test_non_utf8_bytes_name_row_column_and_bytes(tmp_path: Path) -> None:
    path = tmp_path / "latin1.csv"
    text = "session_id,item_id,timestamp\na,A,1700000000\na,B,1700000001\nb,Gartenst\xfchl,1700000002\n"
    path.write_bytes(text.encode("latin-1"))
    msg = fails(options(path), tmp_path / "out")
    assert str(path) in msg and "row 3" in msg and "'item_id'" in msg and "fc" in msg and "UTF-8" in msg


def test_unknown_format_and_unknown_suffix(tmp_path: Path) -> None:
    path = protocol_csv(tmp_path)
    msg = fails(options(path, format="xlsx"), tmp_path / "out")
    assert "'xlsx'" in msg and "--format" in msg
    odd = tmp_path / "clicks.dat"
    odd.write_bytes(path.read_bytes())
    msg = fails(options(odd), tmp_path / "out")
    assert str(odd) in msg and "'.dat'" in msg and "--format" in msg


def test_missing_input_file(tmp_path: Path) -> None:
    path = tmp_path / "nowhere.csv"
    msg = fails(options(path), tmp_path / "out")
    assert str(path) in msg and "no such file" in msg


def test_no_session_left_names_the_step(tmp_path: Path) -> None:
    # Every session has one click: round 1 of the session filter removes everything.
    path = write_csv(tmp_path / "ones.csv", "session_id,item_id,timestamp", [(f"s{k}", "A", T0 + k) for k in range(6)])
    msg = fails(options(path), tmp_path / "out")
    assert str(path) in msg and "'drop sessions shorter than 2 (round 1)'" in msg
    # Sessions of two clicks on items seen 2 times each: the item filter removes everything.
    rows = [(f"s{k}", f"I{k}", T0 + 10 * k) for k in range(4)] + [(f"s{k}", f"I{k}", T0 + 10 * k + 1) for k in range(4)]
    path = write_csv(tmp_path / "rare.csv", "session_id,item_id,timestamp", rows)
    msg = fails(options(path), tmp_path / "out")
    assert "'drop items with fewer than 5 clicks (round 1)'" in msg


def test_time_split_without_training_sessions(tmp_path: Path) -> None:
    # The whole log lies within 12 hours: every session starts in the last day.
    rows = [(s, i, T0 + t) for s, i, t in three_day_log([0, 60, 3600, 3660, 7200, 43200])]
    path = write_csv(tmp_path / "short.csv", "session_id,item_id,timestamp", rows)
    msg = fails(options(path, min_item_clicks=1), tmp_path / "out")
    assert str(path) in msg and "no training sessions" in msg and "--test-days" in msg


def test_bad_options_are_named(tmp_path: Path) -> None:
    path = protocol_csv(tmp_path)
    assert "--time-unit" in fails(options(path, time_unit="ns"), tmp_path / "out")
    assert "--visitor-column" in fails(options(path, visitor_column="v"), tmp_path / "out")
    assert "--min-session-length" in fails(options(path, min_session_length=1), tmp_path / "out")


def test_output_folder_is_replaced_only_on_success(tmp_path: Path) -> None:
    path = protocol_csv(tmp_path)
    out = tmp_path / "prepared"
    prepare_to_folder(options(path), out)
    first = PreparedData.load(out)
    report = json.loads((out / REPORT_FILE).read_text(encoding="utf-8"))
    assert report["steps"][-1]["sessions_left"] == 3 and report["fingerprint"] == first.fingerprint()
    # A failing run leaves the good folder as it was.
    with pytest.raises(InputDataError):
        prepare_to_folder(options(path, item_column="nope"), out)
    assert PreparedData.load(out).fingerprint() == first.fingerprint()
    # A successful run with other options replaces it, leaving no sibling behind.
    prepare_to_folder(options(path, valid_days=0), out)
    again = PreparedData.load(out)  # no validation: v1 v2 v3 train, and W with them
    assert again.valid.n_sessions == 0 and again.item_ids == ["A", "B", "C", "W"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["clicks.csv", "prepared"]
    # A folder holding something else is never replaced.
    other = tmp_path / "notes"
    other.mkdir()
    (other / "todo.txt").write_text("keep me", encoding="utf-8")
    with pytest.raises(InputDataError, match="does not hold a prepared data set"):
        prepare_to_folder(options(path), other)
    assert (other / "todo.txt").read_text(encoding="utf-8") == "keep me"
