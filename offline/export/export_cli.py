"""`cairn export`: write a model artifact into the model store.

    cairn export --checkpoint checkpoints/gru.pt --data data/demo/prepared --name garden [--version V]
    cairn export --random --items 40000 --name bench       (random weights: benchmarks, service tests)

`--names` copies display names (a CSV with `item_id` and `name` columns, such as the demo's
catalogue.csv) into the artifact's optional item_names.json, for the demo shop page.
"""

from __future__ import annotations

import argparse
import csv
import json
from pathlib import Path

from service.artifacts.format import MANIFEST
from service.artifacts.item_vectors import DEFAULT_PRECISIONS, LARGE_DEFAULT_PRECISIONS, PRECISIONS, REDUCED_FROM
from service.errors import InputDataError

DEFAULT_STORE = Path("model_store")
DEFAULT_KNN_NEIGHBOURS = 100
DEFAULT_RANDOM_NEIGHBOURS = 20
CLUSTERED_INDEX = {"auto": None, "always": True, "never": False}  # --clustered-index -> the writers' `clusters`


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a number of at least 1, got {value}")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not value >= 0:
        raise argparse.ArgumentTypeError(f"expected zero or a positive number, got {text}")
    return value


def configure(parser: argparse.ArgumentParser) -> None:
    source = parser.add_mutually_exclusive_group(required=True)
    source.add_argument("--checkpoint", type=Path, metavar="PATH", help="GRU checkpoint written by `cairn train`")
    source.add_argument("--random", action="store_true", help="random weights and tables instead of a trained model")
    parser.add_argument("--data", type=Path, metavar="DIR", help="prepared data set the checkpoint was trained on")
    parser.add_argument("--artifacts", type=Path, default=DEFAULT_STORE, metavar="DIR", help="the artifacts folder (default: %(default)s)")
    parser.add_argument("--name", required=True, help="artifact name, e.g. garden-gru")
    parser.add_argument("--version", help="artifact version (default: UTC time, e.g. 20261202T101500)")
    parser.add_argument(
        "--knn-neighbours",
        type=_positive_int,
        metavar="K",
        help=f"width of the item-KNN fallback table (default: {DEFAULT_KNN_NEIGHBOURS}; {DEFAULT_RANDOM_NEIGHBOURS} with --random)",
    )
    parser.add_argument(
        "--knn-regulariser", type=_non_negative_float, default=20.0, metavar="X", help="item-KNN similarity regulariser (default: %(default)s)"
    )
    parser.add_argument("--metrics", type=Path, metavar="FILE", help="offline metrics (JSON, e.g. `cairn evaluate` output) to record")
    parser.add_argument("--overwrite", action="store_true", help="replace an artifact of the same name and version")
    parser.add_argument(
        "--names", type=Path, metavar="CSV", help="item display names to include (CSV with item_id and name columns, e.g. the demo's catalogue.csv)"
    )
    parser.add_argument(
        "--clustered-index",
        choices=CLUSTERED_INDEX,
        default="auto",
        help="the approximate top-N index over the items (CAIRN_SCORING=clustered): auto builds it from 1,000 items on "
        "when the calibration says CAIRN_SCORING=auto would serve it (not for random weights); always; never (default: %(default)s)",
    )
    parser.add_argument(
        "--precisions",
        nargs="+",
        choices=PRECISIONS,
        metavar="P",
        help=f"reduced-precision copies of the item vectors to include, of {', '.join(PRECISIONS)} (CAIRN_SCORING's paths of those names; "
        f"default: what CAIRN_SCORING=auto serves, {' '.join(DEFAULT_PRECISIONS)} below {REDUCED_FROM:,} items and "
        f"{' '.join(LARGE_DEFAULT_PRECISIONS)} from there, for int4+int8)",
    )
    random = parser.add_argument_group("with --random")
    random.add_argument("--items", type=_positive_int, metavar="N", help="number of items (default: 40000)")
    random.add_argument("--hidden-size", type=_positive_int, metavar="H", help="GRU state and embedding size (default: 100)")
    random.add_argument("--layers", type=_positive_int, metavar="L", help="stacked GRU layers (default: 1)")
    random.add_argument("--seed", type=int, metavar="S", help="random seed (default: 0)")


def run(args: argparse.Namespace) -> int:
    from offline.export.artifact_writer import default_version, export_artifact, write_random_artifact

    version = args.version or default_version()
    random_only = {"--items": args.items, "--hidden-size": args.hidden_size, "--layers": args.layers, "--seed": args.seed}
    if args.random:
        if args.data is not None or args.metrics is not None or args.names is not None:
            raise InputDataError("--data, --metrics and --names describe a trained model; --random takes none of them")
        path = write_random_artifact(
            args.artifacts,
            args.name,
            version,
            n_items=args.items or 40_000,
            hidden_size=args.hidden_size or 100,
            layers=args.layers or 1,
            neighbours=args.knn_neighbours or DEFAULT_RANDOM_NEIGHBOURS,
            seed=args.seed or 0,
            overwrite=args.overwrite,
            clusters=CLUSTERED_INDEX[args.clustered_index],
            precisions=tuple(args.precisions) if args.precisions else None,
        )
    else:
        given = [flag for flag, value in random_only.items() if value is not None]
        if given:
            raise InputDataError(f"{', '.join(given)} only go with --random; a checkpoint fixes the model's sizes")
        if args.data is None:
            raise InputDataError("--data is required with --checkpoint: the prepared data set the model was trained on")
        path = export_artifact(
            args.checkpoint,
            args.data,
            args.artifacts,
            args.name,
            version,
            neighbours=args.knn_neighbours or DEFAULT_KNN_NEIGHBOURS,
            regulariser=args.knn_regulariser,
            metrics=_read_metrics(args.metrics) if args.metrics is not None else None,
            overwrite=args.overwrite,
            names=read_names(args.names) if args.names is not None else None,
            clusters=CLUSTERED_INDEX[args.clustered_index],
            precisions=tuple(args.precisions) if args.precisions else None,
        )
    print(f"wrote {path}")
    skipped = json.loads((path / MANIFEST).read_text(encoding="utf-8")).get("item_clusters_skipped")
    if isinstance(skipped, dict):
        print(f"no clustered index: {skipped.get('reason')} (--clustered-index always builds it anyway)")
    return 0


def _read_metrics(path: Path) -> dict:
    try:
        metrics = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputDataError(f"{path}: no metrics file here") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputDataError(f"{path}: not a readable JSON metrics file ({exc})") from exc
    if not isinstance(metrics, dict):
        raise InputDataError(f"{path}: metrics must be a JSON object, got {type(metrics).__name__}")
    return metrics


def read_names(path: Path) -> dict[str, str]:
    """{item id: name} from a CSV with `item_id` and `name` columns (other columns are ignored)."""
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.DictReader(f)
            missing = [c for c in ("item_id", "name") if c not in (reader.fieldnames or [])]
            if missing:
                raise InputDataError(f"{path}: no {' or '.join(missing)} column; --names needs item_id and name")
            return {row["item_id"]: row["name"] for row in reader if row["item_id"] and row["name"]}
    except FileNotFoundError:
        raise InputDataError(f"{path}: no names file here") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputDataError(f"{path}: not a readable CSV names file ({exc})") from exc
