"""The session state's binary encoding: round trips, the check-and-set token's place, the owner
fingerprint, format 1 still read, damage refused."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pytest

from service.errors import ForeignStateError, StoreError
from service.store.state import FORMAT_VERSION, NEW_TOKEN, SessionState, decode, encode, token_of


def sample() -> SessionState:
    hidden = np.arange(8, dtype=np.float32).reshape(2, 4)  # [L, H]
    return SessionState(
        items=("sku-1", "seed packet ünïcode", "42"),
        hidden=hidden.tobytes(),
        previous_hidden=(hidden * 2).tobytes(),
        model_tag="shop/v2",
        sequence=7,
        event_ids=("e-1", "e-2"),
        last_seen=1_700_000_000.25,
    )


def test_round_trip():
    state = sample()
    assert decode(encode(state, "v-1"), "v-1") == state
    empty = SessionState()
    assert decode(encode(empty, "v-1"), "v-1") == empty
    back = decode(encode(state, "v-1"), "v-1")
    assert np.array_equal(np.frombuffer(back.hidden, dtype=np.float32).reshape(2, 4), np.arange(8, dtype=np.float32).reshape(2, 4))


def test_token_is_sequence_and_nonce_at_bytes_1_to_16():
    # The Redis Lua script compares exactly these bytes; check them against struct, not our own code.
    state = sample()
    value = encode(state, "v-1")
    assert value[0] == FORMAT_VERSION == 2
    assert value[1:17] == struct.pack(">QQ", state.sequence, state.nonce)
    assert token_of(value) == state.token == value[1:17]
    assert token_of(None) == NEW_TOKEN


def test_two_visits_differ_in_nonce():
    assert SessionState().nonce != SessionState().nonce


@pytest.mark.parametrize("cut", [0, 5, 20, 36, 40, -1])
def test_truncated_values_are_refused(cut):
    value = encode(sample(), "v-1")
    with pytest.raises(StoreError):
        decode(value[:cut], "v-1")


def test_trailing_bytes_other_format_and_bad_text_are_refused():
    value = encode(sample(), "v-1")
    with pytest.raises(StoreError, match="does not match"):
        decode(value + b"x", "v-1")
    with pytest.raises(StoreError, match="format 9"):
        decode(bytes([9]) + value[1:], "v-1")
    with pytest.raises(StoreError):
        decode(value[:-2] + b"\xff\xfe", "v-1")  # the last id's bytes no longer UTF-8
    with pytest.raises(StoreError, match="empty"):
        decode(b"", "v-1")


def test_bounds():
    with pytest.raises(StoreError):
        encode(SessionState(items=tuple(str(i) for i in range(256))), "v-1")


def test_the_owner_is_the_session_ids_blake2b_fingerprint_and_another_sessions_value_is_refused():
    # BLAKE2b with an 8-byte digest (RFC 7693), computed here by hashlib over the id's UTF-8.
    value = encode(sample(), "visit-ünï")
    assert value[17:25] == hashlib.blake2b("visit-ünï".encode(), digest_size=8).digest()
    with pytest.raises(ForeignStateError, match="another session"):
        decode(value, "visit-other")
    assert isinstance(ForeignStateError("x"), StoreError)  # a store failure to the callers


def test_format_1_values_are_still_read():
    # Laid out by hand from format 1's documented layout (no owner), as a cairn before format 2
    # wrote it: such a value belongs to whichever key holds it.
    hidden = np.arange(8, dtype=np.float32).reshape(2, 4).tobytes()
    texts = [b"sku-1", b"sku-2", b"e-1"]
    tag = b"shop/v2"
    value = struct.pack(">BQQdBBHII", 1, 2, 99, 1_700_000_000.5, 2, 1, len(tag), len(hidden), 0) + tag + hidden
    value += b"".join(struct.pack(">H", len(t)) + t for t in texts)
    state = decode(value, "any-session")
    assert state == SessionState(items=("sku-1", "sku-2"), hidden=hidden, model_tag="shop/v2", sequence=2,
                                 event_ids=("e-1",), last_seen=1_700_000_000.5, nonce=99)  # fmt: skip
    assert token_of(value) == struct.pack(">QQ", 2, 99)  # the token sits where it did: the stores need no change
