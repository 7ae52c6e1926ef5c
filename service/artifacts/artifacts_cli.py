"""`cairn artifacts`: list the artifacts folder, or verify one artifact.

    cairn artifacts [list] [--artifacts DIR]            name, version, created, key metrics, OK or the problem
    cairn artifacts verify NAME/VERSION|PATH [--artifacts DIR]   exit 0 when sound, 2 with the reason when not
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from service.artifacts.format import STEP_GRAPH, list_artifacts, load_artifact
from service.errors import ArtifactError

DEFAULT_STORE = Path("model_store")
KEY_METRICS = ("recall", "mrr")  # the next-click metrics worth a column; others stay in the manifest
MAX_METRICS = 4


def _add_folder(parser: argparse.ArgumentParser, default: object) -> None:
    # Accepted before and after the action (`cairn artifacts list --artifacts DIR`); given after it, it wins.
    parser.add_argument("--artifacts", type=Path, default=default, metavar="DIR", help=f"the artifacts folder (default: {DEFAULT_STORE})")


def configure(parser: argparse.ArgumentParser) -> None:
    _add_folder(parser, DEFAULT_STORE)
    actions = parser.add_subparsers(dest="action", metavar="ACTION")
    _add_folder(actions.add_parser("list", help="list every artifact in the folder (the default)"), argparse.SUPPRESS)
    verify = actions.add_parser("verify", help="check one artifact: checksums, format, tables, step graph")
    verify.add_argument("artifact", metavar="NAME/VERSION|PATH", help="an artifact of the folder, or the path of an artifact folder")
    _add_folder(verify, argparse.SUPPRESS)


def run(args: argparse.Namespace) -> int:
    if args.action == "verify":
        return _verify(artifact_folder(args.artifact, args.artifacts))
    return _list(args.artifacts)


def artifact_folder(given: str, folder: Path) -> Path:
    """NAME/VERSION inside `folder` when that exists (or `given` is not a path that exists), else `given` as a path."""
    inside = folder / given
    if inside.is_dir() or not Path(given).exists():
        parts = Path(given).parts
        if len(parts) == 2 and not inside.is_dir():
            raise ArtifactError(f"{given}: no such artifact in {folder} (--artifacts)")
        if len(parts) == 2:
            return inside
    return Path(given)


def _list(store: Path) -> int:
    listings = list_artifacts(store)
    if not listings:
        print(f"no artifacts in {store}")
        return 0
    rows = [("NAME", "VERSION", "CREATED", "METRICS", "STATUS")]
    for a in listings:
        manifest = a.manifest or {}
        rows.append(
            (
                a.name,
                a.version,
                str(manifest.get("created_at", "-")),
                key_metrics(manifest.get("metrics")) or "-",
                "OK" if a.problem is None else f"PROBLEM: {a.problem}",
            )
        )
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    for r in rows:
        print("  ".join(cell.ljust(w) for cell, w in zip(r[:4], widths)) + "  " + r[4])
    return 0


def _verify(path: Path) -> int:
    # Beyond the checksums: the tables must load and the step graph must open with the expected
    # inputs and sizes, which is what the service will do with it.
    artifact = load_artifact(path)
    from service.runtime.onnx_step import OnnxStep

    step = OnnxStep(path / STEP_GRAPH)
    if step.n_items != artifact.n_items:
        raise ArtifactError(f"{path}: step graph scores {step.n_items} items, the item map has {artifact.n_items}")
    print(
        f"OK {path}: {artifact.name} {artifact.version}, {artifact.n_items} items, "
        f"GRU {step.layers}x{step.hidden_size}, {len(artifact.manifest['files'])} files match their checksums"
    )
    return 0


def key_metrics(metrics: Any) -> str:
    """A short 'name=value' summary of the Recall/MRR figures found anywhere in a metrics object."""
    flat = _flatten(metrics) if isinstance(metrics, dict) else []
    picked = [(k, v) for k, v in flat if any(m in k.lower() for m in KEY_METRICS)] or flat
    return " ".join(f"{k}={v:.4g}" for k, v in picked[:MAX_METRICS])


def _flatten(obj: dict, prefix: str = "") -> list[tuple[str, float]]:
    out: list[tuple[str, float]] = []
    for key, value in obj.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            out.extend(_flatten(value, name + "."))
        elif isinstance(value, (int, float)) and not isinstance(value, bool):
            out.append((name, float(value)))
    return out
