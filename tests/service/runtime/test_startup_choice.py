"""Which artifact a starting service serves when none is named: the newest that loads."""

from __future__ import annotations

import logging
import os
import time
from pathlib import Path

import pytest

from service.config import Settings
from service.errors import SettingsError
from service.runtime.active import resolve_choices
from tests._support.servers import serve_in_thread


def _damage(path: Path) -> None:
    with open(path / "popularity.npy", "r+b") as f:  # one byte changed after export: checksum mismatch
        f.seek(-1, os.SEEK_END)
        last = f.read(1)
        f.seek(-1, os.SEEK_END)
        f.write(bytes([last[0] ^ 0xFF]))


def _store(tmp_path: Path, versions: list[str]) -> Path:
    from offline.export.artifact_writer import write_random_artifact

    for i, version in enumerate(versions):  # created in this order: the last is the newest
        write_random_artifact(tmp_path, "shop", version, n_items=60, hidden_size=8, neighbours=5, seed=i)
        time.sleep(0.01)
    return tmp_path


def test_the_default_is_the_version_created_last(tmp_path: Path) -> None:
    store = _store(tmp_path, ["v10", "v9"])
    assert [c.version for c in resolve_choices(Settings(artifacts=store))] == ["v9", "v10"]


def test_a_damaged_newest_version_is_skipped_loudly_and_the_service_starts_on_the_one_before(tmp_path: Path, caplog) -> None:
    store = _store(tmp_path, ["v1", "v2"])
    _damage(store / "shop" / "v2")
    with caplog.at_level(logging.WARNING, logger="cairn.service"):
        with serve_in_thread(Settings(artifacts=store, log_level="warning")) as running, running.client() as c:
            answer = c.post("/v1/sessions/s-1/clicks", json={"item_id": "sku-000007"}).json()
    assert answer["artifact"] == "shop/v1" and answer["served_by"] == "gru"
    assert any("NOT serving the newest artifact shop/v2" in r.getMessage() for r in caplog.records)


def test_nothing_that_verifies_stops_start_up_with_one_line(tmp_path: Path) -> None:
    store = _store(tmp_path, ["v1"])
    _damage(store / "shop" / "v1")
    with pytest.raises(SettingsError, match="no version of 'shop' verifies .*v1: .*checksum mismatch"):
        resolve_choices(Settings(artifacts=store))
