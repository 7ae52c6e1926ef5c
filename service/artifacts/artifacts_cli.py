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
    rows = [("NAME", "VERSION", "CREATED", "MODEL", "RECALL@20", "MRR@20", "STATUS")]
    for a in listings:
        manifest = a.manifest or {}
        model, recall, mrr = own_figures(manifest.get("metrics"))
        created = str(manifest.get("created_at", "-"))[:16]  # to the minute: enough to tell them apart here
        rows.append((a.name, a.version, created, model, recall, mrr, "OK" if a.problem is None else f"PROBLEM: {a.problem}"))
    widths = [max(len(r[i]) for r in rows) for i in range(6)]
    for r in rows:
        cells = [r[i].ljust(widths[i]) if i < 4 else r[i].rjust(widths[i]) for i in range(6)]
        print("  ".join(cells) + "  " + r[6])
    return 0


def own_figures(metrics: Any) -> tuple[str, str, str]:
    """(model, Recall@20, MRR@20) the artifact recorded of its own evaluation, "-" where it has none."""
    model = metrics.get("model") if isinstance(metrics, dict) else None
    if not isinstance(model, dict):
        return "-", "-", "-"

    def value(name: str) -> str:
        entry = model.get(name)
        return f"{entry['value']:.4f}" if isinstance(entry, dict) and isinstance(entry.get("value"), (int, float)) else "-"

    return str(model.get("name", "-")), value("recall@20"), value("mrr@20")


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
