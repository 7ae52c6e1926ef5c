"""The session state's binary encoding: round trips, the check-and-set token's place, damage refused."""

from __future__ import annotations

import struct

import numpy as np
import pytest

from service.errors import StoreError
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
    assert decode(encode(state)) == state
    empty = SessionState()
    assert decode(encode(empty)) == empty
    back = decode(encode(state))
    assert np.array_equal(np.frombuffer(back.hidden, dtype=np.float32).reshape(2, 4), np.arange(8, dtype=np.float32).reshape(2, 4))


def test_token_is_sequence_and_nonce_at_bytes_1_to_16():
    # The Redis Lua script compares exactly these bytes; check them against struct, not our own code.
    state = sample()
    value = encode(state)
    assert value[0] == FORMAT_VERSION
    assert value[1:17] == struct.pack(">QQ", state.sequence, state.nonce)
    assert token_of(value) == state.token == value[1:17]
    assert token_of(None) == NEW_TOKEN


def test_two_visits_differ_in_nonce():
    assert SessionState().nonce != SessionState().nonce


@pytest.mark.parametrize("cut", [0, 5, 20, 36, 40, -1])
def test_truncated_values_are_refused(cut):
    value = encode(sample())
    with pytest.raises(StoreError):
        decode(value[:cut])


def test_trailing_bytes_other_format_and_bad_text_are_refused():
    value = encode(sample())
    with pytest.raises(StoreError, match="does not match"):
        decode(value + b"x")
    with pytest.raises(StoreError, match="format 9"):
        decode(bytes([9]) + value[1:])
    with pytest.raises(StoreError):
        decode(value[:-2] + b"\xff\xfe")  # the last id's bytes no longer UTF-8


def test_bounds():
    with pytest.raises(StoreError):
        encode(SessionState(items=tuple(str(i) for i in range(256))))
