"""Model artifacts in the model store: write, verify, load, list. numpy only, never torch.

Layout: `<store>/<name>/<version>/` holding

    step.onnx        one GRU step for a batch of sessions (I/O contract below)
    item_ids.json    list of item ids (strings), index order: the model's item vocabulary
    neighbours.npz   item-KNN table: items int32 [n_items, K] (-1 pads), scores float32 [n_items, K]
    popularity.npy   float32 [n_items], training click counts
    item_names.json  optional: {item id: display name} for some or all items (the demo shop's page
                     shows them); listed in `files` and checked like the others when present
    sessions.npz     optional: the session-KNN index (service/runtime/session_knn.py, `SessionIndex`):
                     session_indptr, session_items, item_indptr, item_sessions; its parameters
                     (neighbours, candidates, weighting) in the manifest's `session_knn`
    manifest.json    format, name, version, created_at, data_fingerprint, model, hyperparameters,
                     metrics, serving_defaults {exclude_seen}, files {file name: SHA-256 hex},
                     manifest_sha256

step.onnx I/O:
    inputs   items int64 [B]; hidden float32 [L, B, H]; top_n int64 [1]
    outputs  next_hidden float32 [L, B, H]; top_items int64 [B, top_n]; top_scores float32 [B, top_n]
             (descending); scores float32 [B, n_items] (every item, for callers that rank themselves)

An artifact is written into a hidden temporary folder, flushed to disk and renamed into place, so
a reader never sees half of one. A reader refuses an artifact whose format or any checksum does not
match. The manifest checks itself too: `manifest_sha256` is the SHA-256 of the manifest's exact
bytes with that value replaced by 64 zeros, so changing any byte of any file is caught.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import shutil
import tempfile
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from service.artifacts.hashed_writes import write_hashed
from service.artifacts.mapped import mapped_npz
from service.errors import ArtifactError
from service.runtime.session_knn import WEIGHTINGS, SessionIndex



@dataclass(frozen=True)
class RowBlocks:
    """An array file written a block of rows at a time, so the whole table never exists in memory:
    `blocks()` yields C-ordered arrays of `dtype` whose rows add up to `shape`."""

    shape: tuple[int, ...]
    dtype: np.dtype
    blocks: Callable[[], Iterator[np.ndarray]]


FileContent = bytes | np.ndarray | RowBlocks | Callable[[], bytes | np.ndarray | RowBlocks | None]  # an optional file's content, or how to make it (None: no file)

FORMAT = "cairn-artifact/1"
MANIFEST = "manifest.json"
STEP_GRAPH = "step.onnx"
ITEM_IDS = "item_ids.json"
NEIGHBOURS = "neighbours.npz"
POPULARITY = "popularity.npy"
ITEM_NAMES = "item_names.json"
SESSIONS = "sessions.npz"  # optional
REQUIRED_FILES = (STEP_GRAPH, ITEM_IDS, NEIGHBOURS, POPULARITY)
_WRITER_FIELDS = frozenset({"format", "name", "version", "created_at", "files", "manifest_sha256"})
_UNSET_DIGEST = "0" * 64
_HEX_DIGEST = re.compile(r"[0-9a-f]{64}")


# Training options renamed to names of our own; an artifact or checkpoint with an old key is refused
# with the new name (offline/model/gru.py checks checkpoints against the same table).
RENAMED_HYPERPARAMETERS = {
    "dropout_embedding": "input_dropout",
    "dropout_hidden": "state_dropout",
    "bpreg": "score_penalty",
    "sample_alpha": "negative_skew",
}


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@dataclass
class Artifact:
    path: Path
    manifest: dict[str, Any]
    item_ids: list[str]
    neighbour_items: np.ndarray  # int32 [n_items, K], -1 where an item has fewer than K neighbours
    neighbour_scores: np.ndarray  # float32 [n_items, K]
    popularity: np.ndarray  # float32 [n_items]
    item_index: dict[str, int] = field(repr=False, default_factory=dict)
    item_names: dict[str, str] = field(repr=False, default_factory=dict)  # empty when the artifact has no names
    session_index: SessionIndex | None = field(repr=False, default=None)  # None: this artifact cannot serve session-knn

    @property
    def session_knn(self) -> dict[str, Any]:
        """{"neighbours": k, "candidates": M, "weighting": ...} of the session index (empty without one)."""
        value = self.manifest.get("session_knn")
        return value if isinstance(value, dict) else {}

    @property
    def exclude_seen(self) -> bool:
        """The serving default for requests that do not say: the evaluation's choice, else True."""
        defaults = self.manifest.get("serving_defaults")
        value = defaults.get("exclude_seen") if isinstance(defaults, dict) else None
        return value if isinstance(value, bool) else True

    @property
    def name(self) -> str:
        return str(self.manifest["name"])

    @property
    def version(self) -> str:
        return str(self.manifest["version"])

    @property
    def step_graph(self) -> Path:
        return self.path / STEP_GRAPH

    @property
    def n_items(self) -> int:
        return len(self.item_ids)


@dataclass
class ArtifactListing:
    name: str
    version: str
    path: Path
    manifest: dict[str, Any] | None
    problem: str | None  # why it does not verify, or None


def write_artifact(
    store: Path,
    name: str,
    version: str,
    step_graph: bytes,
    item_ids: list[str],
    neighbour_items: np.ndarray,
    neighbour_scores: np.ndarray,
    popularity: np.ndarray,
    manifest_fields: dict[str, Any],
    overwrite: bool = False,
    item_names: dict[str, str] | None = None,
    session_index: SessionIndex | None = None,
    extra_files: dict[str, FileContent] | None = None,
) -> Path:
    """Write one artifact atomically; returns its folder. `item_names` (id -> display name, for
    items of `item_ids` only) adds the optional item_names.json. With `session_index`, manifest_fields
    must hold its parameters as `session_knn` ({"neighbours", "candidates", "weighting"}).
    `extra_files`: more optional files (bytes as they are, arrays as .npy, RowBlocks block by block;
    a callable returning one of these is called when its file is written, in the order given, so a
    large table exists only while it is written; one returning None leaves its file out), covered
    by the manifest's checksums like the required ones. A callable value of `manifest_fields` is
    called when the manifest is written, after every file: a section measured while the files were
    being written (None: the field is left out)."""
    _check_name(name, "name")
    _check_name(version, "version")
    reserved = sorted(set(manifest_fields) & _WRITER_FIELDS)
    if reserved:
        raise ArtifactError(f"manifest fields {reserved} are written by write_artifact itself")
    neighbour_items, neighbour_scores, popularity = np.asarray(neighbour_items), np.asarray(neighbour_scores), np.asarray(popularity)
    _check_tables(len(item_ids), neighbour_items, neighbour_scores, popularity, f"artifact {name}/{version}")
    files = list(REQUIRED_FILES)
    if item_names:
        _check_names(item_names, set(map(str, item_ids)), f"artifact {name}/{version}")
        files.append(ITEM_NAMES)
    if session_index is not None:
        _check_session_index(len(item_ids), session_index, manifest_fields.get("session_knn"), f"artifact {name}/{version}")
        files.append(SESSIONS)
    target = Path(store) / name / version
    if target.exists() and not overwrite:
        raise ArtifactError(f"{target} exists already; choose another version (--version) or replace it (--overwrite)")
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{version}.", dir=target.parent))
    # Every file is hashed from memory as it is written (service/artifacts/hashed_writes.py: the
    # large tables, about 1 GB at a million items, go to disk with direct I/O), except the .npz
    # files, which numpy's zip writer makes on disk: those are read back and hashed in a second
    # thread while the next file is made (hashlib lets go of the GIL).
    hashing = ThreadPoolExecutor(max_workers=1, thread_name_prefix="artifact-sha256")
    npz_hashing = ThreadPoolExecutor(max_workers=1, thread_name_prefix="artifact-sha256-npz")
    digests: dict[str, Future[str] | str] = {}

    def npz_written(fname: str) -> None:
        digests[fname] = npz_hashing.submit(sha256_file, tmp / fname)

    try:
        digests[STEP_GRAPH] = _write_file(tmp / STEP_GRAPH, step_graph, hashing)
        digests[ITEM_IDS] = _write_file(tmp / ITEM_IDS, json.dumps([str(i) for i in item_ids]).encode("utf-8"), hashing)
        np.savez(tmp / NEIGHBOURS, items=neighbour_items.astype(np.int32, copy=False), scores=neighbour_scores.astype(np.float32, copy=False))
        npz_written(NEIGHBOURS)
        digests[POPULARITY] = _write_file(tmp / POPULARITY, popularity.astype(np.float32, copy=False), hashing)
        if item_names:
            digests[ITEM_NAMES] = _write_file(tmp / ITEM_NAMES, json.dumps(item_names, ensure_ascii=False, sort_keys=True).encode("utf-8"), hashing)
        if session_index is not None:
            np.savez(tmp / SESSIONS, **session_index.arrays())
            npz_written(SESSIONS)
        for fname, content in (extra_files or {}).items():
            digest = _write_extra(tmp / fname, content, hashing)
            if digest is not None:
                digests[fname] = digest
        made = {k: v() if callable(v) else v for k, v in manifest_fields.items()}
        manifest = {
            "format": FORMAT,
            "name": name,
            "version": version,
            "created_at": datetime.now(timezone.utc).isoformat(timespec="milliseconds"),
            **{k: v for k, v in made.items() if v is not None},
            "files": {f: _digest(digests[f]) for f in (*files, *(extra_files or {})) if f in digests},
            "manifest_sha256": _UNSET_DIGEST,
        }
        (tmp / MANIFEST).write_bytes(_sealed_manifest(manifest))
        _fsync_folder(tmp)
        if target.exists():
            shutil.rmtree(target)
        os.replace(tmp, target)
        _fsync_path(target.parent)
    except BaseException:
        npz_hashing.shutdown(wait=True, cancel_futures=True)  # no hash may still be reading a file of tmp
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    finally:
        npz_hashing.shutdown(wait=True)
        hashing.shutdown(wait=True)
    return target


def _digest(value: Future[str] | str) -> str:
    return value if isinstance(value, str) else value.result()


def _write_extra(path: Path, content: FileContent, hasher: ThreadPoolExecutor) -> str | None:
    """Write one optional file and return its SHA-256 digest; None when its callable made nothing
    (the file is left out)."""
    if path.name in (*REQUIRED_FILES, MANIFEST) or path.name != Path(path.name).name:
        raise ArtifactError(f"optional artifact file {path.name!r} would overwrite a required one")
    if callable(content):
        content = content()
        if content is None:
            return None
    return _write_file(path, content, hasher)


def _write_file(path: Path, content: bytes | np.ndarray | RowBlocks, hasher: ThreadPoolExecutor) -> str:
    """Write bytes as they are, an array or RowBlocks as np.save writes it (format 1.0 header); its SHA-256 digest."""
    if isinstance(content, bytes):
        return write_hashed(path, [content], hasher)
    if isinstance(content, RowBlocks):
        return write_hashed(path, _row_block_parts(path, content), hasher)
    array = np.ascontiguousarray(content)
    return write_hashed(path, [_npy_header(array.dtype, array.shape), array.data], hasher)


def _npy_header(dtype: np.dtype, shape: tuple[int, ...]) -> bytes:
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(header, {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)), "fortran_order": False, "shape": tuple(shape)})
    return header.getvalue()


def _row_block_parts(path: Path, content: RowBlocks) -> Iterator[bytes | memoryview]:
    """The .npy file np.save writes for the whole array, from its blocks: the header, then each block."""
    dtype = np.dtype(content.dtype)
    yield _npy_header(dtype, content.shape)
    rows = 0
    for block in content.blocks():
        if block.dtype != dtype or block.shape[1:] != tuple(content.shape[1:]):
            raise ArtifactError(f"{path.name}: a block of {block.dtype} {block.shape} in a {dtype} {content.shape} table")
        yield np.ascontiguousarray(block).data
        rows += len(block)
    if rows != content.shape[0]:
        raise ArtifactError(f"{path.name}: the blocks held {rows} rows, the table {content.shape[0]}")


def verify_artifact(path: Path) -> dict[str, Any]:
    """Return the manifest of a sound artifact; raise ArtifactError saying what is wrong otherwise."""
    path = Path(path)
    mpath = path / MANIFEST
    if not mpath.is_file():
        raise ArtifactError(f"{path}: no {MANIFEST}; not an artifact")
    try:
        raw = mpath.read_bytes()
        manifest = json.loads(raw.decode("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ArtifactError(f"{mpath}: unreadable manifest ({exc})") from exc
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        found = manifest.get("format") if isinstance(manifest, dict) else None
        raise ArtifactError(f"{mpath}: format {found!r}, this cairn reads {FORMAT!r}")
    _check_manifest_seal(mpath, raw, manifest)
    # A copied folder whose manifest names another artifact would serve under two names.
    named = (manifest.get("name"), manifest.get("version"))
    if named != (path.parent.name, path.name):
        raise ArtifactError(
            f"{mpath}: the manifest names {named[0]}/{named[1]} but the folder is {path.parent.name}/{path.name}; "
            "export it under its own name instead of copying it"
        )
    hyperparameters = manifest.get("hyperparameters")
    for old, new in RENAMED_HYPERPARAMETERS.items():
        if isinstance(hyperparameters, dict) and old in hyperparameters:
            raise ArtifactError(f"{mpath}: written by an older cairn (hyperparameter {old!r}, now {new!r}); export it again")
    files = manifest.get("files")
    if not isinstance(files, dict):
        raise ArtifactError(f"{mpath}: no 'files' checksums")
    for fname in REQUIRED_FILES:
        if fname not in files:
            raise ArtifactError(f"{mpath}: no checksum for {fname}")
    for fname, digest in files.items():
        # A manifest names files inside its own folder only.
        if not isinstance(fname, str) or fname in (MANIFEST, "", ".", "..") or "/" in fname or "\\" in fname:
            raise ArtifactError(f"{mpath}: bad file name {fname!r} in 'files'")
        fpath = path / fname
        if not fpath.is_file():
            raise ArtifactError(f"{fpath}: missing")
        if sha256_file(fpath) != digest:
            raise ArtifactError(f"{fpath}: checksum mismatch (the file changed after export)")
    return manifest


def load_artifact(path: Path) -> Artifact:
    """Verify, then load everything except the ONNX graph (the runtime opens that itself)."""
    path = Path(path)
    manifest = verify_artifact(path)
    try:
        item_ids = json.loads((path / ITEM_IDS).read_text(encoding="utf-8"))
        neighbours = mapped_npz(path / NEIGHBOURS)  # shared pages, not a private copy per worker
        n_items_arr, n_scores = neighbours["items"], neighbours["scores"]
        popularity = np.load(path / POPULARITY)
        # verify_artifact checked every file `files` lists; names are read only when listed there.
        item_names = json.loads((path / ITEM_NAMES).read_text(encoding="utf-8")) if ITEM_NAMES in manifest["files"] else {}
    except (OSError, ValueError, KeyError) as exc:
        raise ArtifactError(f"{path}: unreadable artifact file ({exc})") from exc
    if not isinstance(item_ids, list) or not all(isinstance(i, str) for i in item_ids):
        raise ArtifactError(f"{path / ITEM_IDS}: not a list of item id strings")
    n = len(item_ids)
    if len(set(item_ids)) != n:
        raise ArtifactError(f"{path / ITEM_IDS}: item ids repeat; each item must appear once")
    model = manifest.get("model")
    model_items = model.get("n_items") if isinstance(model, dict) else None
    if model_items is not None and model_items != n:
        raise ArtifactError(f"{path}: manifest says the model scores {model_items} items, {ITEM_IDS} has {n}")
    _check_tables(n, n_items_arr, n_scores, popularity, str(path))
    if item_names:
        _check_names(item_names, set(item_ids), str(path / ITEM_NAMES))
    session_index = None
    if SESSIONS in manifest["files"]:
        try:
            z = mapped_npz(path / SESSIONS)
            session_index = SessionIndex(
                session_indptr=z["session_indptr"].astype(np.int64, copy=False),
                session_items=z["session_items"].astype(np.int32, copy=False),
                item_indptr=z["item_indptr"].astype(np.int64, copy=False),
                item_sessions=z["item_sessions"].astype(np.int32, copy=False),
                candidates=int(manifest.get("session_knn", {}).get("candidates", 0)) if isinstance(manifest.get("session_knn"), dict) else 0,
            )
        except (OSError, ValueError, KeyError, ArtifactError) as exc:
            raise ArtifactError(f"{path / SESSIONS}: unreadable session index ({exc})") from exc
        _check_session_index(n, session_index, manifest.get("session_knn"), str(path))
    return Artifact(
        path=path,
        manifest=manifest,
        item_ids=item_ids,
        neighbour_items=n_items_arr.astype(np.int32, copy=False),
        neighbour_scores=n_scores.astype(np.float32, copy=False),
        popularity=popularity.astype(np.float32, copy=False),
        item_index={item: i for i, item in enumerate(item_ids)},
        item_names=item_names,
        session_index=session_index,
    )


def list_artifacts(store: Path) -> list[ArtifactListing]:
    """Every `<name>/<version>` folder in the store, verified (checksums, format, manifest); within a
    name, ordered by creation time (the manifest's `created_at`), so the newest version is last."""
    store = Path(store)
    out: list[ArtifactListing] = []
    if not store.is_dir():
        return out
    for name_dir in sorted(p for p in store.iterdir() if p.is_dir() and not p.name.startswith(".")):
        versions = [p for p in name_dir.iterdir() if p.is_dir() and not p.name.startswith(".")]
        for vdir in sorted(versions, key=lambda p: (_created_at(p), _version_key(p.name))):
            try:
                manifest, problem = verify_artifact(vdir), None
            except ArtifactError as exc:
                manifest, problem = None, str(exc)
            out.append(ArtifactListing(name=name_dir.name, version=vdir.name, path=vdir, manifest=manifest, problem=problem))
    return out


def _sealed_manifest(manifest: dict[str, Any]) -> bytes:
    """The manifest's bytes with `manifest_sha256` filled in (see the module docstring)."""
    raw = json.dumps(manifest, indent=2, sort_keys=True).encode("utf-8")
    unset = _seal_field(_UNSET_DIGEST)
    if raw.count(unset) != 1:
        raise ArtifactError("manifest fields must not contain another 'manifest_sha256' entry")
    return raw.replace(unset, _seal_field(hashlib.sha256(raw).hexdigest()))


def _seal_field(digest: str) -> bytes:
    return f'"manifest_sha256": "{digest}"'.encode("ascii")


def _check_manifest_seal(mpath: Path, raw: bytes, manifest: dict[str, Any]) -> None:
    digest = manifest.get("manifest_sha256")
    if not isinstance(digest, str) or not _HEX_DIGEST.fullmatch(digest):
        raise ArtifactError(f"{mpath}: no valid 'manifest_sha256' (the manifest was edited or is not cairn's)")
    field = _seal_field(digest)
    if raw.count(field) != 1 or hashlib.sha256(raw.replace(field, _seal_field(_UNSET_DIGEST))).hexdigest() != digest:
        raise ArtifactError(f"{mpath}: checksum mismatch (the manifest changed after export)")


def _check_tables(n: int, neighbour_items: np.ndarray, neighbour_scores: np.ndarray, popularity: np.ndarray, where: str) -> None:
    if neighbour_items.ndim != 2 or neighbour_items.shape[0] != n or neighbour_scores.shape != neighbour_items.shape:
        raise ArtifactError(
            f"{where}: neighbour table items {neighbour_items.shape} / scores {neighbour_scores.shape} do not fit {n} items"
        )
    if popularity.shape != (n,):
        raise ArtifactError(f"{where}: popularity has shape {popularity.shape}, expected ({n},)")
    if neighbour_items.size and (neighbour_items.min() < -1 or neighbour_items.max() >= n):
        raise ArtifactError(f"{where}: neighbour indices must be -1 (padding) or 0..{n - 1}")


def _check_names(item_names: Any, item_ids: set[str], where: str) -> None:
    if not isinstance(item_names, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in item_names.items()):
        raise ArtifactError(f"{where}: item names must map item id strings to name strings")
    stray = sorted(set(item_names) - item_ids)
    if stray:
        raise ArtifactError(f"{where}: names for {len(stray)} item(s) the artifact does not have, e.g. {stray[0]!r}")
def _check_session_index(n: int, index: SessionIndex, params: Any, where: str) -> None:
    """A session index that cannot send the service out of bounds, and its parameters."""
    ok = isinstance(params, dict)
    neighbours, candidates, weighting = (params.get("neighbours"), params.get("candidates"), params.get("weighting")) if ok else (None,) * 3
    if not (isinstance(neighbours, int) and neighbours >= 1 and isinstance(candidates, int) and candidates >= 1 and weighting in WEIGHTINGS):
        raise ArtifactError(f"{where}: session_knn needs neighbours >= 1, candidates >= 1 and a weighting of {WEIGHTINGS}, got {params!r}")
    for indptr, values, rows, bound, what in (
        (index.session_indptr, index.session_items, None, n, "session_items"),
        (index.item_indptr, index.item_sessions, n, index.n_sessions, "item_sessions"),
    ):
        if indptr.ndim != 1 or len(indptr) < 1 or indptr[0] != 0 or indptr[-1] != len(values) or (np.diff(indptr) < 0).any():
            raise ArtifactError(f"{where}: session index {what} has a bad pointer array")
        if rows is not None and len(indptr) != rows + 1:
            raise ArtifactError(f"{where}: session index covers {len(indptr) - 1} items, the artifact has {rows}")
        if len(values) and (values.min() < 0 or values.max() >= bound):
            raise ArtifactError(f"{where}: session index {what} points outside 0..{bound - 1}")


def _fsync_path(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_folder(folder: Path) -> None:
    # Rename-into-place is only atomic after a crash if the contents reached the disk first.
    for p in folder.iterdir():
        _fsync_path(p)
    _fsync_path(folder)


def _created_at(folder: Path) -> str:
    """When an artifact was written: its manifest's `created_at` (read without verifying it, so a
    damaged newest version still sorts as the newest), else the folder's modification time."""
    try:
        created = json.loads((folder / MANIFEST).read_text(encoding="utf-8")).get("created_at")
        if isinstance(created, str):
            return created
    except (OSError, ValueError, AttributeError):
        pass
    return datetime.fromtimestamp(folder.stat().st_mtime, timezone.utc).isoformat()


def _version_key(version: str) -> tuple:
    # "v2" < "v10": compare digit runs as numbers.
    return tuple(int(t) if t.isdigit() else t for t in re.split(r"(\d+)", version))


def _check_name(value: str, what: str) -> None:
    if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}", value or ""):
        raise ArtifactError(f"artifact {what} {value!r}: use 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit")
