"""Read the service's click events back from a sink: a folder of JSON Lines files or a Redis stream.

SINK is what CAIRN_EVENTS was: a folder, or a redis:// URL (then `--redis-prefix`, default
`cairn:`, names the stream `<prefix>events`). Events come back in time order. A line that is not
JSON (a batch a crash cut short leaves at most one, at the end of a file) is skipped and counted.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.config import redacted
from service.errors import EventSinkError
from service.events.event import FIELDS
from service.events.sinks import FILE_PREFIX, FILE_SUFFIX, STREAM_FIELD, stream_key

REQUIRED = ("t", "session_id", "sequence", "item_id", "shown")
STREAM_PAGE = 10_000


@dataclass
class EventBatch:
    events: list[dict[str, Any]]
    source: str
    skipped: int = 0  # unreadable lines
    files: list[str] = field(default_factory=list)


def read_events(sink: str, redis_prefix: str = "cairn:") -> EventBatch:
    if sink.startswith(("redis://", "rediss://")):
        batch = _read_stream(sink, stream_key(redis_prefix))
    else:
        batch = _read_folder(Path(sink))
    batch.events.sort(key=lambda e: e["t"])
    return batch


def _check(record: Any) -> bool:
    return isinstance(record, dict) and all(k in record for k in REQUIRED) and isinstance(record["shown"], list)


def _read_folder(folder: Path) -> EventBatch:
    if not folder.is_dir():
        raise EventSinkError(f"--from {str(folder)!r}: no such folder (give the folder CAIRN_EVENTS named, or a redis:// URL)")
    files = sorted(folder.glob(f"{FILE_PREFIX}*{FILE_SUFFIX}"))
    batch = EventBatch([], str(folder), files=[f.name for f in files])
    for path in files:
        with open(path, "rb") as f:
            for line in f:
                _take(batch, line)
    return batch


def _take(batch: EventBatch, raw: bytes | None) -> None:
    """Add one event, as JSON text, to the batch; count it as skipped when unreadable or malformed."""
    try:
        record = json.loads(raw) if raw is not None else None
    except ValueError:
        record = None
    if record is not None and _check(record):
        batch.events.append(record)
    else:
        batch.skipped += 1


def _read_stream(url: str, key: str) -> EventBatch:
    import redis
    from redis.exceptions import RedisError

    batch = EventBatch([], f"{redacted(url)} {key}")
    try:
        client = redis.Redis.from_url(url, socket_timeout=10, socket_connect_timeout=5)
        try:
            start = "-"
            while True:
                page = client.xrange(key, min=start, count=STREAM_PAGE)
                for _, fields in page:
                    _take(batch, fields.get(STREAM_FIELD))
                if len(page) < STREAM_PAGE:
                    break
                start = "(" + page[-1][0].decode()
        finally:
            client.close()
    except (RedisError, OSError) as exc:
        raise EventSinkError(f"--from {redacted(url)}: cannot read the event stream ({type(exc).__name__})") from None
    return batch


__all__ = ["FIELDS", "EventBatch", "read_events"]
