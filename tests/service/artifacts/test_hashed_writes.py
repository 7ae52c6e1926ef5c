"""service/artifacts/hashed_writes.py: the file holds exactly the bytes given, and the digest is
SHA-256 of the file (reference: Python's hashlib over the file as read back, FIPS 180-4), with
direct I/O, where the filesystem refuses it at open, and where it refuses a direct write."""

from __future__ import annotations

import errno
import hashlib
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

from service.artifacts import hashed_writes
from service.artifacts.hashed_writes import STAGING_BYTES, write_hashed

# Sizes around the block (4 KiB) and the staging buffer, split into parts of uneven lengths.
SIZES = [0, 1, 4095, 4096, 4097, STAGING_BYTES - 1, STAGING_BYTES, 2 * STAGING_BYTES + 12_345]


def parts_of(data: bytes, rng: np.random.Generator) -> list[bytes | memoryview]:
    cuts = np.sort(rng.integers(0, len(data) + 1, 3)) if data else []
    edges = [0, *cuts, len(data)]
    return [memoryview(data)[a:b] if i % 2 else data[a:b] for i, (a, b) in enumerate(zip(edges[:-1], edges[1:]))]


def check(folder: Path, name: str) -> None:
    rng = np.random.default_rng(len(name))
    with ThreadPoolExecutor(max_workers=1) as hasher:
        for size in SIZES:
            data = rng.integers(0, 256, size, dtype=np.uint8).tobytes()
            path = folder / f"{name}-{size}.bin"
            digest = write_hashed(path, parts_of(data, rng), hasher)
            assert path.read_bytes() == data
            assert digest == hashlib.sha256(path.read_bytes()).hexdigest()


def test_the_file_holds_the_bytes_and_the_digest_is_theirs(tmp_path: Path) -> None:
    # With direct I/O where the filesystem takes it (ext4 here).
    check(tmp_path, "direct")


def test_a_filesystem_that_refuses_direct_io_at_open_gets_buffered_writes(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Filesystems without direct I/O refuse O_DIRECT at open with EINVAL (open(2)); this machine's
    # filesystems all accept it (tmpfs too, on recent kernels), so the refusal is made here.
    real_open, refused = os.open, []

    def no_direct(path, flags, mode=0o777):
        if flags & os.O_DIRECT:
            refused.append(path)
            raise OSError(errno.EINVAL, "Invalid argument")
        return real_open(path, flags, mode)

    monkeypatch.setattr(hashed_writes.os, "open", no_direct)
    check(tmp_path, "buffered")
    assert len(refused) == len(SIZES)


def test_a_refused_direct_write_goes_on_buffered_from_where_it_stopped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Some filesystems open with O_DIRECT and then refuse the write (EINVAL): the second direct write
    # here is refused once, as such a filesystem would; the file must still be whole.
    real_write, calls = os.write, []

    def refusing(fd: int, data) -> int:
        calls.append(len(data))
        if len(calls) == 2:
            raise OSError(errno.EINVAL, "Invalid argument")
        return real_write(fd, data)

    monkeypatch.setattr(hashed_writes.os, "write", refusing)
    data = np.random.default_rng(1).integers(0, 256, 3 * STAGING_BYTES + 100, dtype=np.uint8).tobytes()
    with ThreadPoolExecutor(max_workers=1) as hasher:
        digest = write_hashed(tmp_path / "t.bin", [data], hasher)
    assert len(calls) >= 3 and (tmp_path / "t.bin").read_bytes() == data
    assert digest == hashlib.sha256(data).hexdigest()
