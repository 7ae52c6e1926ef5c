"""Artifact arrays as read-only memory maps: workers on one host share their pages (the OS's page
cache) instead of each holding a private copy.

`.npy` files map directly. The `.npz` tables (neighbours, session index) are zip archives that
`np.savez` writes uncompressed (stored), so each member's `.npy` bytes lie contiguous in the file
and map the same way, at the member's offset; nothing is read into private memory. numpy only.
"""

from __future__ import annotations

import struct
import zipfile
from pathlib import Path

import numpy as np

from service.errors import ArtifactError

_LOCAL_HEADER = struct.Struct("<4s22xHH")  # a zip member's local header: signature, ..., name length, extra length
_LOCAL_SIGNATURE = b"PK\x03\x04"


def mapped_array(file: Path, dtype: type, ndim: int) -> np.ndarray:
    """A .npy file as a read-only memory map; ArtifactError when unreadable or of another type."""
    try:
        a = np.load(file, mmap_mode="r")
    except (OSError, ValueError) as exc:
        raise ArtifactError(f"{file}: unreadable ({exc})") from exc
    if a.dtype != dtype or a.ndim != ndim:
        raise ArtifactError(f"{file}: {a.dtype} with {a.ndim} axes, expected {np.dtype(dtype)} with {ndim}")
    return a


def mapped_npz(file: Path) -> dict[str, np.ndarray]:
    """Every member of an uncompressed .npz as a read-only array over a memory map, by name without
    `.npy`; ArtifactError for a compressed member, an object array or a member that does not fit."""
    out: dict[str, np.ndarray] = {}
    try:
        with zipfile.ZipFile(file) as archive, open(file, "rb") as raw:
            for info in archive.infolist():
                name = info.filename.removesuffix(".npy")
                if info.compress_type != zipfile.ZIP_STORED or not info.filename.endswith(".npy"):
                    raise ArtifactError(f"{file}: member {info.filename!r} is not a stored .npy array (written by np.savez?)")
                raw.seek(info.header_offset)
                signature, name_length, extra_length = _LOCAL_HEADER.unpack(raw.read(_LOCAL_HEADER.size))
                if signature != _LOCAL_SIGNATURE:
                    raise ArtifactError(f"{file}: member {info.filename!r} has no local header where the directory says")
                start = info.header_offset + _LOCAL_HEADER.size + name_length + extra_length
                raw.seek(start)
                version = np.lib.format.read_magic(raw)
                read_header = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
                shape, fortran_order, dtype = read_header(raw)
                offset = raw.tell()
                size = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
                if dtype.hasobject or fortran_order or offset + size > start + info.file_size:
                    raise ArtifactError(f"{file}: member {info.filename!r} ({dtype}, {shape}) is not a plain C-ordered array inside its member")
                # A plain array over the map: slicing it per request builds no memmap objects.
                out[name] = np.memmap(file, dtype=dtype, mode="r", offset=offset, shape=shape).view(np.ndarray) if size else np.zeros(shape, dtype)
    except (OSError, ValueError, zipfile.BadZipFile, struct.error) as exc:
        raise ArtifactError(f"{file}: unreadable ({exc})") from exc
    return out
