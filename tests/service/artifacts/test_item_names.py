"""The artifact's optional item names: written, covered by the checksums, and refused when they do
not fit the artifact's items."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import ITEM_NAMES, MANIFEST, load_artifact, sha256_file, verify_artifact, write_artifact
from service.errors import ArtifactError

IDS = ["GS-00001", "GS-00002", "GS-00003"]


def _write(store: Path, names: dict[str, str] | None, version: str = "v1") -> Path:
    items = np.array([[1], [2], [0]], dtype=np.int32)
    scores = np.ones((3, 1), dtype=np.float32)
    popularity = np.array([3, 2, 1], dtype=np.float32)
    return write_artifact(store, "garden", version, b"graph", IDS, items, scores, popularity, {}, item_names=names)


def test_names_round_trip_and_are_checksummed(tmp_path: Path) -> None:
    names = {"GS-00001": "Trowel stainless", "GS-00003": "Bulb planter <small> & \"round\""}
    path = _write(tmp_path, names)
    manifest = verify_artifact(path)
    # SHA-256 (FIPS 180-4) of the file as written, listed like the required files.
    assert manifest["files"][ITEM_NAMES] == sha256_file(path / ITEM_NAMES)
    assert load_artifact(path).item_names == names  # exact strings, nothing escaped in the file
    (path / ITEM_NAMES).write_text(json.dumps({**names, "GS-00002": "Changed"}), encoding="utf-8")
    with pytest.raises(ArtifactError, match="checksum mismatch"):
        verify_artifact(path)


def test_without_names_there_is_no_file_and_no_names(tmp_path: Path) -> None:
    path = _write(tmp_path, None)
    assert not (path / ITEM_NAMES).exists() and ITEM_NAMES not in json.loads((path / MANIFEST).read_text())["files"]
    assert load_artifact(path).item_names == {}


def test_names_of_unknown_items_or_not_strings_are_refused(tmp_path: Path) -> None:
    with pytest.raises(ArtifactError, match="names for 1 item.*'GS-09999'"):
        _write(tmp_path, {"GS-00001": "Rake", "GS-09999": "Ghost"})
    with pytest.raises(ArtifactError, match="must map item id strings to name strings"):
        _write(tmp_path, {"GS-00001": 7}, version="v2")  # type: ignore[dict-item]
    assert not (tmp_path / "garden" / "v1").exists() and not (tmp_path / "garden" / "v2").exists()
