"""Artifacts in the model store: written, verified, listed, and refused when anything changed."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import (
    FORMAT,
    ITEM_IDS,
    MANIFEST,
    NEIGHBOURS,
    POPULARITY,
    REQUIRED_FILES,
    STEP_GRAPH,
    RowBlocks,
    list_artifacts,
    load_artifact,
    sha256_file,
    verify_artifact,
    write_artifact,
)
from service.artifacts.artifacts_cli import own_figures
from service.cli import main as cairn
from service.errors import ArtifactError

ALL_FILES = (*REQUIRED_FILES, MANIFEST)


def small_artifact(store: Path, name: str = "garden", version: str = "v1", **kw) -> Path:
    """A valid artifact of 6 items; the step graph bytes are opaque to this module."""
    n = 6
    items = np.array([[1, 2], [0, -1], [3, 0], [2, 4], [5, -1], [4, 3]], dtype=np.int32)
    scores = np.array([[0.9, 0.5], [0.7, 0], [0.4, 0.3], [0.8, 0.1], [0.6, 0], [0.5, 0.2]], dtype=np.float32)
    return write_artifact(
        store,
        name,
        version,
        step_graph=b"\x08\x08not-really-onnx" * 50,
        item_ids=[f"seed-{i}" for i in range(n)],
        neighbour_items=items,
        neighbour_scores=scores,
        popularity=np.arange(n, dtype=np.float32),
        manifest_fields={"data_fingerprint": "abc", "model": {"kind": "gru", "n_items": n}, "metrics": {"recall@20": 0.5}},
        **kw,
    )


def test_sha256_matches_the_published_test_vector(tmp_path: Path) -> None:
    # FIPS 180-2, Appendix B.1: SHA-256("abc") (from memory; hashlib agrees below).
    (tmp_path / "abc").write_bytes(b"abc")
    expected = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert sha256_file(tmp_path / "abc") == expected == hashlib.sha256(b"abc").hexdigest()


def test_write_verify_load(tmp_path: Path) -> None:
    path = small_artifact(tmp_path)
    assert path == tmp_path / "garden" / "v1"
    assert sorted(p.name for p in path.iterdir()) == sorted(ALL_FILES)
    assert [p.name for p in (tmp_path / "garden").iterdir()] == ["v1"], "no temporary folder left behind"
    manifest = verify_artifact(path)
    assert manifest["format"] == FORMAT and manifest["name"] == "garden" and manifest["version"] == "v1"
    assert manifest["data_fingerprint"] == "abc" and manifest["metrics"] == {"recall@20": 0.5}
    for f in REQUIRED_FILES:  # checksums as hashlib computes them over the bytes on disk
        assert manifest["files"][f] == hashlib.sha256((path / f).read_bytes()).hexdigest()
    artifact = load_artifact(path)
    assert artifact.n_items == 6 and artifact.item_index["seed-4"] == 4
    assert artifact.neighbour_items.dtype == np.int32 and artifact.neighbour_items[1, 1] == -1
    np.testing.assert_array_equal(artifact.popularity, np.arange(6))
    assert artifact.step_graph == path / STEP_GRAPH


@pytest.mark.parametrize("fname", ALL_FILES)
def test_one_changed_byte_anywhere_is_refused(tmp_path: Path, fname: str) -> None:
    path = small_artifact(tmp_path)
    fpath = path / fname
    original = fpath.read_bytes()
    for pos in sorted({0, len(original) // 3, len(original) // 2, len(original) - 1}):
        changed = bytearray(original)
        changed[pos] ^= 0x01
        fpath.write_bytes(bytes(changed))
        with pytest.raises(ArtifactError, match=fname.replace(".", r"\.")):
            verify_artifact(path)
        with pytest.raises(ArtifactError):
            load_artifact(path)
        fpath.write_bytes(original)
        verify_artifact(path)  # sound again once restored


def test_a_manifest_rewritten_with_other_values_is_refused(tmp_path: Path) -> None:
    path = small_artifact(tmp_path)
    manifest = json.loads((path / MANIFEST).read_text())
    manifest["metrics"] = {"recall@20": 0.99}  # valid JSON, valid format, but not what was exported
    (path / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True))
    with pytest.raises(ArtifactError, match="manifest changed after export"):
        verify_artifact(path)
    del manifest["manifest_sha256"]
    (path / MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match="no valid 'manifest_sha256'"):
        verify_artifact(path)


def test_truncated_step_graph_is_refused(tmp_path: Path) -> None:
    path = small_artifact(tmp_path)
    data = (path / STEP_GRAPH).read_bytes()
    (path / STEP_GRAPH).write_bytes(data[: len(data) // 2])
    with pytest.raises(ArtifactError, match=r"step\.onnx: checksum mismatch"):
        verify_artifact(path)


@pytest.mark.parametrize("fname", REQUIRED_FILES)
def test_missing_file_is_refused(tmp_path: Path, fname: str) -> None:
    path = small_artifact(tmp_path)
    (path / fname).unlink()
    with pytest.raises(ArtifactError, match=f"{fname.replace('.', '[.]')}: missing"):
        verify_artifact(path)


def test_missing_manifest_and_other_format_are_refused(tmp_path: Path) -> None:
    path = small_artifact(tmp_path)
    raw = (path / MANIFEST).read_text()
    (path / MANIFEST).write_text(raw.replace(f'"format": "{FORMAT}"', '"format": "cairn-artifact/2"'))
    with pytest.raises(ArtifactError, match=r"format 'cairn-artifact/2', this cairn reads 'cairn-artifact/1'"):
        verify_artifact(path)
    (path / MANIFEST).unlink()
    with pytest.raises(ArtifactError, match="no manifest.json; not an artifact"):
        verify_artifact(path)


def test_write_refuses_bad_names_clashes_and_inconsistent_tables(tmp_path: Path) -> None:
    small_artifact(tmp_path)
    with pytest.raises(ArtifactError, match="exists already"):
        small_artifact(tmp_path)
    (tmp_path / "garden" / "v1" / "left-over").write_text("from the old one")
    small_artifact(tmp_path, overwrite=True)
    verify_artifact(tmp_path / "garden" / "v1")
    assert not (tmp_path / "garden" / "v1" / "left-over").exists(), "overwrite replaces the whole folder"
    for bad_name in ("../up", "", ".hidden", "a/b"):
        with pytest.raises(ArtifactError, match="artifact name"):
            small_artifact(tmp_path, name=bad_name)
    with pytest.raises(ArtifactError, match="popularity has shape"):
        write_artifact(tmp_path, "x", "v1", b"", ["a", "b"], np.zeros((2, 1), np.int32), np.zeros((2, 1)), np.zeros(3), {})
    with pytest.raises(ArtifactError, match="neighbour indices"):
        write_artifact(tmp_path, "x", "v1", b"", ["a", "b"], np.array([[1], [2]]), np.zeros((2, 1)), np.zeros(2), {})
    with pytest.raises(ArtifactError, match=r"\['format'\] are written by write_artifact"):
        write_artifact(tmp_path, "x", "v1", b"", ["a", "b"], np.array([[1], [0]]), np.zeros((2, 1)), np.zeros(2), {"format": "x"})
    assert not (tmp_path / "x").exists(), "refused before anything is written"


def test_list_orders_versions_by_creation_and_reports_problems(tmp_path: Path) -> None:
    import time

    for version in ("v10", "v2", "v1"):
        small_artifact(tmp_path, version=version)
        time.sleep(0.01)  # created_at has millisecond resolution
    small_artifact(tmp_path, name="bench", version="20261202T101500")
    (tmp_path / "garden" / ".v3.tmp").mkdir()  # a write in progress: invisible
    (tmp_path / "garden" / "stray").mkdir()  # not an artifact: sorts by the folder's time, the newest here
    (tmp_path / "garden" / "v2" / POPULARITY).write_bytes(b"changed")
    listing = list_artifacts(tmp_path)
    assert [(a.name, a.version) for a in listing] == [
        ("bench", "20261202T101500"),
        ("garden", "v10"),
        ("garden", "v2"),
        ("garden", "v1"),
        ("garden", "stray"),
    ]
    problems = {a.version: a.problem for a in listing}
    assert problems["v1"] is None and problems["v10"] is None
    assert "popularity.npy: checksum mismatch" in problems["v2"]
    assert "no manifest.json" in problems["stray"]
    assert list_artifacts(tmp_path / "absent") == []


def test_load_refuses_tables_that_do_not_fit(tmp_path: Path) -> None:
    path = small_artifact(tmp_path)
    # Re-sealed by hand as if written by a faulty exporter: checksums fine, contents inconsistent.
    from service.artifacts.format import _sealed_manifest

    (path / ITEM_IDS).write_text(json.dumps(["a", "a", "b", "c", "d", "e"]))
    manifest = json.loads((path / MANIFEST).read_text())
    manifest["files"][ITEM_IDS] = sha256_file(path / ITEM_IDS)
    manifest["manifest_sha256"] = "0" * 64
    (path / MANIFEST).write_bytes(_sealed_manifest(manifest))
    verify_artifact(path)
    with pytest.raises(ArtifactError, match="item ids repeat"):
        load_artifact(path)


def test_cli_lists_and_verifies(tmp_path: Path, capsys) -> None:
    from offline.export.artifact_writer import write_random_artifact

    store = tmp_path / "store"
    good = write_random_artifact(store, "bench", "v1", n_items=200, hidden_size=8, neighbours=5)
    bad = write_random_artifact(store, "bench", "v2", n_items=200, hidden_size=8, neighbours=5)
    with open(bad / NEIGHBOURS, "r+b") as f:
        f.seek(100)
        byte = f.read(1)
        f.seek(100)
        f.write(bytes([byte[0] ^ 0xFF]))

    assert cairn(["artifacts", "--artifacts", str(store)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["NAME", "VERSION", "CREATED", "MODEL", "RECALL@20", "MRR@20", "STATUS"]
    assert max(len(line) for line in lines if "PROBLEM" not in line) < 100  # a narrow table
    assert lines[1].split()[:2] == ["bench", "v1"] and lines[1].rstrip().endswith("OK")
    assert lines[2].split()[:2] == ["bench", "v2"] and "PROBLEM" in lines[2] and "neighbours.npz: checksum mismatch" in lines[2]

    assert cairn(["artifacts", "verify", str(good)]) == 0
    assert capsys.readouterr().out.startswith(f"OK {good}: bench v1, 200 items, GRU 1x8")
    assert cairn(["artifacts", "verify", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("cairn artifacts: error: ") and "neighbours.npz: checksum mismatch" in err and err.count("\n") == 1
    assert cairn(["artifacts", "verify", str(tmp_path / "nowhere")]) == 2
    assert "no manifest.json" in capsys.readouterr().err
    assert cairn(["artifacts", "--artifacts", str(tmp_path / "empty")]) == 0
    assert "no artifacts" in capsys.readouterr().out


def test_cli_takes_the_folder_after_the_action_and_artifacts_by_name(tmp_path: Path, capsys) -> None:
    from offline.export.artifact_writer import write_random_artifact

    store = tmp_path / "store"
    write_random_artifact(store, "bench", "v1", n_items=50, hidden_size=8, neighbours=5)
    assert cairn(["artifacts", "list", "--artifacts", str(store)]) == 0
    assert capsys.readouterr().out.splitlines()[1].split()[:2] == ["bench", "v1"]
    assert cairn(["artifacts", "verify", "bench/v1", "--artifacts", str(store)]) == 0
    assert capsys.readouterr().out.startswith("OK ")
    assert cairn(["artifacts", "--artifacts", str(store), "verify", "bench/v9"]) == 2
    assert "bench/v9: no such artifact" in capsys.readouterr().err


def test_an_artifact_with_a_retired_hyperparameter_name_is_refused_naming_both(tmp_path: Path) -> None:
    from offline.export.artifact_writer import write_random_artifact

    path = write_random_artifact(tmp_path, "bench", "v1", n_items=50, hidden_size=8, neighbours=5)
    manifest = json.loads((path / MANIFEST).read_text())
    old = "bp" + "reg"  # in pieces: the retired name appears nowhere else in the repository
    manifest["hyperparameters"] = {old: 1.0}
    manifest["manifest_sha256"] = "0" * 64  # unsealed, then sealed again below
    from service.artifacts.format import _sealed_manifest

    (path / MANIFEST).write_bytes(_sealed_manifest(manifest))  # re-sealed as an older exporter would have
    with pytest.raises(ArtifactError, match=f"'{old}', now 'score_penalty'"):
        verify_artifact(path)


def test_verify_cli_opens_the_step_graph(tmp_path: Path, capsys) -> None:
    # Checksums can match a graph that was never a cairn step graph: verify must catch that too.
    path = small_artifact(tmp_path)
    assert cairn(["artifacts", "verify", str(path)]) == 2
    assert "cannot open the step graph" in capsys.readouterr().err


def test_the_listing_shows_the_artifacts_own_model_figures() -> None:
    metrics = {"model": {"name": "gru-top1-max", "recall@20": {"value": 0.61234, "ci95": [0.6, 0.62]}, "mrr@20": {"value": 0.25, "ci95": [0.2, 0.3]}}}
    assert own_figures(metrics) == ("gru-top1-max", "0.6123", "0.2500")
    assert own_figures({}) == ("-", "-", "-") and own_figures(None) == ("-", "-", "-")

def test_a_copied_folder_whose_manifest_names_another_artifact_is_refused(tmp_path: Path) -> None:
    import shutil

    original = small_artifact(tmp_path, "garden", "v1")
    copy = tmp_path / "garden" / "v2"
    shutil.copytree(original, copy)
    with pytest.raises(ArtifactError, match="manifest names garden/v1 but the folder is garden/v2"):
        verify_artifact(copy)
    problems = {a.version: a.problem for a in list_artifacts(tmp_path)}
    assert problems["v1"] is None and "names garden/v1" in problems["v2"]


def test_versions_are_ordered_by_creation_time_not_by_name(tmp_path: Path) -> None:
    import time

    small_artifact(tmp_path, "garden", "v10")
    time.sleep(0.01)  # created_at has millisecond resolution
    small_artifact(tmp_path, "garden", "v9")
    assert [a.version for a in list_artifacts(tmp_path)] == ["v10", "v9"]  # v9 was created last: newest


def test_a_table_written_in_blocks_is_the_file_numpy_saves(tmp_path: Path) -> None:
    # Reference: numpy's own np.save / np.load (the .npy format, NEP 1): the file written block by
    # block must be byte for byte what np.save writes for the whole table, and covered by the checksums.
    table = np.arange(7 * 3, dtype=np.float32).reshape(7, 3) / 7
    blocks = RowBlocks((7, 3), np.dtype(np.float32), lambda: iter([table[:4], table[4:]]))
    path = small_artifact(tmp_path, extra_files={"rows.npy": blocks})
    np.save(tmp_path / "whole.npy", table)
    assert (path / "rows.npy").read_bytes() == (tmp_path / "whole.npy").read_bytes()
    assert verify_artifact(path)["files"]["rows.npy"] == sha256_file(tmp_path / "whole.npy")


@pytest.mark.parametrize(
    "blocks, said",
    [
        (lambda t: [t[:4]], "held 4 rows, the table 7"),
        (lambda t: [t.astype(np.float64)], "a block of float64"),
        (lambda t: [t[:, :2], t[:, 2:]], "a block of float32 (7, 2)"),
    ],
)
def test_blocks_that_do_not_make_the_table_are_refused_and_nothing_is_left(tmp_path: Path, blocks, said: str) -> None:
    table = np.zeros((7, 3), dtype=np.float32)
    with pytest.raises(ArtifactError, match=said.replace("(", r"\(").replace(")", r"\)")):
        small_artifact(tmp_path, extra_files={"rows.npy": RowBlocks((7, 3), np.dtype(np.float32), lambda: iter(blocks(table)))})
    assert not (tmp_path / "garden").exists() or not any((tmp_path / "garden").iterdir())


def test_the_fallback_tables_are_mapped_from_the_files_not_copied(tmp_path: Path) -> None:
    # Two workers on one host then share the neighbour table's pages (a million items: 160 MB each).
    import mmap

    def maps_a_file(a: np.ndarray) -> bool:
        base = a
        while base is not None and not isinstance(base, mmap.mmap):
            base = base.base
        return base is not None

    a = load_artifact(small_artifact(tmp_path))
    assert maps_a_file(a.neighbour_items) and maps_a_file(a.neighbour_scores)
    assert a.neighbour_items.dtype == np.int32 and a.neighbour_items[0].tolist() == [1, 2]
