"""The public surface, pinned: the OpenAPI document's paths, operations and schema field names, and
the option names of every `cairn` command (and sub-action), against the checked-in snapshot
tests/public_surface.json. A rename is then always a deliberate, reviewed change: regenerate with

    .venv/bin/python -m tests.test_public_surface > tests/public_surface.json

and let the diff show what users will meet.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

SNAPSHOT = Path(__file__).with_name("public_surface.json")


def _options(parser: argparse.ArgumentParser) -> dict[str, Any]:
    out: dict[str, Any] = {"options": sorted(s for a in parser._actions for s in a.option_strings)}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            out["actions"] = {name: _options(sub) for name, sub in sorted(action.choices.items())}
        elif not action.option_strings and action.dest not in ("help",):
            out.setdefault("arguments", []).append(action.metavar or action.dest)
    return out


def surface() -> dict[str, Any]:
    from service.api.app import create_app
    from service.cli import COMMANDS, build_parser
    from service.config import Settings

    commands = {}
    for name in COMMANDS:
        parser = build_parser(name)
        sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[name]
        commands[name] = _options(sub)
    doc = create_app(Settings()).openapi()
    paths = {path: sorted(ops) for path, ops in sorted(doc["paths"].items())}
    schemas = {name: sorted(s.get("properties", {})) for name, s in sorted(doc["components"]["schemas"].items())}
    settings = sorted(f"CAIRN_{f.upper()}" for f in Settings.model_fields)
    return {"commands": commands, "http_paths": paths, "http_schemas": schemas, "settings": settings}


def test_the_public_surface_matches_the_snapshot() -> None:
    expected = json.loads(SNAPSHOT.read_text(encoding="utf-8"))
    assert surface() == expected, "the public surface changed: regenerate tests/public_surface.json (see this module's docstring) and review the diff"


# Names that read as borrowed from other programs, replaced by names of our own. Written in pieces
# so that this file is not itself a hit when the repository is searched for them.
_RETIRED = [
    "--" + "bp" + "reg", "--" + "sample-" + "alpha", "dropout-" + "embedding", "dropout-" + "hidden",
    "/v1/" + "models", "model-" + "store", "MODEL_" + "STORE", "popularity" + "@", "took" + "_ms",
]
_TEXT_SUFFIXES = {".py", ".md", ".toml", ".yaml", ".conf", ".txt", ".json", ".cfg", ""}


def test_no_retired_name_is_left_in_the_repository() -> None:
    import subprocess

    root = SNAPSHOT.parents[1]
    tracked = subprocess.run(["git", "ls-files"], cwd=root, capture_output=True, text=True, check=True).stdout.split()
    for name in tracked:
        path = root / name
        if path.suffix not in _TEXT_SUFFIXES or not path.is_file():
            continue
        text = path.read_text(encoding="utf-8", errors="replace")
        for old in _RETIRED:
            assert old not in text, f"{name} still says {old!r}"


if __name__ == "__main__":
    json.dump(surface(), sys.stdout, indent=1, sort_keys=True)
    print()
