"""`cairn artifacts`: list the model store, or verify one artifact.

    cairn artifacts [--store model_store]     name, version, created_at, key metrics, OK or the problem
    cairn artifacts verify PATH               exit 0 when sound, 2 with the reason when not
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


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--store", type=Path, default=DEFAULT_STORE, metavar="DIR", help="model store folder (default: %(default)s)")
    actions = parser.add_subparsers(dest="action", metavar="ACTION")
    actions.add_parser("list", help="list every artifact in the store (the default)")
    verify = actions.add_parser("verify", help="check one artifact: checksums, format, tables, step graph")
    verify.add_argument("path", type=Path, metavar="PATH", help="artifact folder, <store>/<name>/<version>")


def run(args: argparse.Namespace) -> int:
    if args.action == "verify":
        return _verify(args.path)
    return _list(args.store)


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
