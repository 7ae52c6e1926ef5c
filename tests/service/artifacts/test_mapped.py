"""Artifact arrays as memory maps (service/artifacts/mapped.py): the .npz tables map member by member
and read exactly what numpy's own np.load reads."""

from __future__ import annotations

import mmap
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.mapped import mapped_npz
from service.errors import ArtifactError


def _maps_a_file(a: np.ndarray) -> bool:
    base = a
    while base is not None and not isinstance(base, mmap.mmap):
        base = base.base
    return base is not None


def test_members_are_what_np_load_reads_and_are_file_maps(tmp_path: Path) -> None:
    # Reference: numpy's np.savez / np.load (the .npz of the .npy format, NEP 1), including members
    # whose data starts at an odd offset (a one-byte member before) and an empty member.
    rng = np.random.default_rng(0)
    arrays = {
        "odd": np.array([7], dtype=np.uint8),
        "items": rng.integers(-1, 1000, size=(50, 9)).astype(np.int32),
        "scores": rng.random((50, 9), dtype=np.float32),
        "indptr": np.arange(0, 4000, 3, dtype=np.int64),
        "empty": np.zeros((0, 4), dtype=np.float32),
    }
    np.savez(tmp_path / "t.npz", **arrays)
    got = mapped_npz(tmp_path / "t.npz")
    with np.load(tmp_path / "t.npz") as want:
        assert sorted(got) == sorted(want.files)
        for name in want.files:
            assert got[name].dtype == want[name].dtype and np.array_equal(got[name], want[name]), name
    assert _maps_a_file(got["items"]) and not got["items"].flags.writeable  # shared pages, read-only


def test_a_zip64_archive_maps_too(tmp_path: Path) -> None:
    # np.savez writes large members with zip64 extra fields in the local header (force_zip64):
    # the data starts after them.
    import zipfile

    a = np.arange(1000, dtype=np.float32)
    with zipfile.ZipFile(tmp_path / "z.npz", "w", compression=zipfile.ZIP_STORED) as z, z.open("a.npy", "w", force_zip64=True) as f:
        np.lib.format.write_array(f, a)
    assert np.array_equal(mapped_npz(tmp_path / "z.npz")["a"], a)


def test_what_cannot_be_mapped_is_refused_naming_the_file(tmp_path: Path) -> None:
    np.savez_compressed(tmp_path / "c.npz", a=np.arange(10))
    with pytest.raises(ArtifactError, match=r"c\.npz: member 'a\.npy' is not a stored \.npy array"):
        mapped_npz(tmp_path / "c.npz")
    np.savez(tmp_path / "o.npz", a=np.array([{"x": 1}], dtype=object))
    with pytest.raises(ArtifactError, match=r"o\.npz: member 'a\.npy' \(object"):
        mapped_npz(tmp_path / "o.npz")
    (tmp_path / "junk.npz").write_bytes(b"not a zip at all")
    with pytest.raises(ArtifactError, match=r"junk\.npz: unreadable"):
        mapped_npz(tmp_path / "junk.npz")
    np.savez(tmp_path / "t.npz", a=np.arange(100_000, dtype=np.int64))
    data = bytearray((tmp_path / "t.npz").read_bytes())
    (tmp_path / "cut.npz").write_bytes(bytes(data[: len(data) // 2]))  # the directory is gone with the tail
    with pytest.raises(ArtifactError, match=r"cut\.npz: unreadable"):
        mapped_npz(tmp_path / "cut.npz")
