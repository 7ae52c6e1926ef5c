"""A session's state and its one-value binary encoding (format 2; format 1 is still read).

One value per session key, so a sharded store (Redis Cluster) never needs cross-slot work.
Clicks are kept as item ids, not indices, so a model with another vocabulary can replay them.

Layout, big-endian (`struct`):

    offset  size  field
    0       1     format version (2)
    1       8     sequence: clicks applied so far (u64)        } the check-and-set token: bytes 1..16,
    9       8     nonce: random, fixed for the visit (u64)      } compared by the stores before a write
    17      8     owner: the session id's fingerprint (u64, the first 8 bytes of BLAKE2b of its UTF-8)
    25      8     last_seen: unix seconds (f64)
    33      1     number of clicks kept (u8)
    34      1     number of event ids kept (u8)
    35      2     model tag length in bytes (u16), 0: no hidden state
    37      4     hidden length in bytes (u32)
    41      4     previous hidden length in bytes (u32)
    45      ...   model tag (utf-8), hidden, previous hidden (float32 [L, H], C order),
                  then each click id and each event id as u16 length + utf-8 bytes

Format 1 is the same without `owner`; such values (written before this format) are read as they
are, so a rolling upgrade keeps its visits, and replaced by format 2 at their next click.

`owner` binds a value to its session: a store reply that carries another session's state (a
client that matched a reply to the wrong command, a key written by mistake) is refused as a
`ForeignStateError`, a store failure, rather than served as this visit's clicks.

`hidden` is the GRU state after the last known click; `previous_hidden` the state before it, so the
current list of a visit can be recomputed with one step instead of a replay. Both are valid only for
the model named by `model_tag`. The nonce tells two visits apart that reuse a session id after a
DELETE, so a write computed from the old visit cannot land on the new one with the same sequence.
"""

from __future__ import annotations

import hashlib
import secrets
import struct
from dataclasses import dataclass, field

from service.errors import ForeignStateError, StoreError

FORMAT_VERSION = 2
_HEAD = struct.Struct(">BQQQdBBHII")  # format 2
_HEAD_V1 = struct.Struct(">BQQdBBHII")  # format 1: no owner
_LEN = struct.Struct(">H")
TOKEN_SLICE = slice(1, 17)  # sequence + nonce: what a check-and-set compares
NEW_TOKEN = b""  # expected token of a session that must not exist yet


def owner_of(session_id: str) -> int:
    return int.from_bytes(hashlib.blake2b(session_id.encode(), digest_size=8).digest(), "big")


@dataclass(frozen=True)
class SessionState:
    items: tuple[str, ...] = ()  # last N clicked item ids, oldest first
    hidden: bytes | None = None  # float32 [L, H] after the last known click
    previous_hidden: bytes | None = None  # float32 [L, H] before the last known click
    model_tag: str | None = None  # "name/version" of the model that produced the hidden states
    sequence: int = 0  # clicks applied
    event_ids: tuple[str, ...] = ()  # recent client event ids, oldest first
    last_seen: float = 0.0  # unix seconds of the last write
    nonce: int = field(default_factory=lambda: secrets.randbits(64))

    @property
    def token(self) -> bytes:
        return _HEAD.pack(FORMAT_VERSION, self.sequence, self.nonce, 0, 0.0, 0, 0, 0, 0, 0)[TOKEN_SLICE]


def encode(state: SessionState, session_id: str) -> bytes:
    if len(state.items) > 255 or len(state.event_ids) > 255:
        raise StoreError(f"session state keeps at most 255 clicks and event ids, got {len(state.items)}, {len(state.event_ids)}")
    tag = (state.model_tag or "").encode()
    hidden = state.hidden or b""
    previous = state.previous_hidden or b""
    parts = [
        _HEAD.pack(
            FORMAT_VERSION,
            state.sequence,
            state.nonce,
            owner_of(session_id),
            state.last_seen,
            len(state.items),
            len(state.event_ids),
            len(tag),
            len(hidden),
            len(previous),
        ),
        tag,
        hidden,
        previous,
    ]
    for text in (*state.items, *state.event_ids):
        raw = text.encode()
        parts.append(_LEN.pack(len(raw)))
        parts.append(raw)
    return b"".join(parts)


def decode(value: bytes, session_id: str) -> SessionState:
    """Parse the value stored for `session_id`: ForeignStateError when it names another session as
    its owner; StoreError for a value of another format or a damaged one."""
    try:
        if not value:
            raise StoreError("empty session state")
        version = value[0]
        if version == FORMAT_VERSION:
            version, sequence, nonce, owner, last_seen, n_items, n_events, n_tag, n_hidden, n_previous = _HEAD.unpack_from(value, 0)
            if owner != owner_of(session_id):
                raise ForeignStateError("the session store answered with another session's state")
            pos = _HEAD.size
        elif version == 1:
            version, sequence, nonce, last_seen, n_items, n_events, n_tag, n_hidden, n_previous = _HEAD_V1.unpack_from(value, 0)
            pos = _HEAD_V1.size
        else:
            raise StoreError(f"session state format {version}, this cairn reads 1 and {FORMAT_VERSION}")
        tag = value[pos : pos + n_tag].decode()
        pos += n_tag
        hidden = value[pos : pos + n_hidden]
        pos += n_hidden
        previous = value[pos : pos + n_previous]
        pos += n_previous
        texts = []
        for _ in range(n_items + n_events):
            (n,) = _LEN.unpack_from(value, pos)
            pos += _LEN.size
            texts.append(value[pos : pos + n].decode())
            pos += n
        if pos != len(value) or len(hidden) != n_hidden or len(previous) != n_previous:
            raise StoreError(f"session state of {len(value)} bytes does not match its header")
    except (struct.error, UnicodeDecodeError) as exc:
        raise StoreError(f"damaged session state ({type(exc).__name__})") from exc
    return SessionState(
        items=tuple(texts[:n_items]),
        hidden=hidden or None,
        previous_hidden=previous or None,
        model_tag=tag or None,
        sequence=sequence,
        event_ids=tuple(texts[n_items:]),
        last_seen=last_seen,
        nonce=nonce,
    )


def token_of(value: bytes | None) -> bytes:
    """The check-and-set token of a stored value (of any format that keeps this header), or NEW_TOKEN."""
    return NEW_TOKEN if value is None else bytes(value[TOKEN_SLICE])
