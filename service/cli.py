"""`cairn`: one entry point, one subcommand per step.

Each subcommand lives in the module that does the work; that module exposes
`configure(parser: argparse.ArgumentParser) -> None` and `run(args: argparse.Namespace) -> int`.
Modules are imported only when their subcommand runs, so `cairn serve` never imports torch.
Errors cairn raises on purpose (`CairnError`) and bad values print one line and exit 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from service.errors import CairnError

# name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "demo-data": ("service.offline.scenario_cli", "generate the garden-shop demo click log and its oracle"),
    "prepare": ("service.offline.clicklog_cli", "turn a raw click log into train/valid/test sessions"),
    "train": ("service.offline.train_cli", "train the GRU next-click model"),
    "export": ("service.offline.export_cli", "write a model artifact into the model store"),
    "evaluate": ("service.offline.evaluate_cli", "compare recommenders on the test sessions"),
    "artifacts": ("service.artifacts_cli", "list and verify artifacts in the model store"),
    "serve": ("service.api.serve_cli", "run the HTTP recommendation service"),
    "loadtest": ("service.load.loadtest_cli", "replay held-out visits against the service and judge the page budget"),
    "capacity": ("service.load.capacity_cli", "find the highest rate per core that meets the budget"),
}


def build_parser(selected: str | None = None) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="cairn", description="Next-click recommendations for anonymous visits.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (module_name, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if name == selected:
            importlib.import_module(module_name).configure(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    selected = next((a for a in argv if not a.startswith("-")), None)
    if selected not in COMMANDS:
        selected = None
    parser = build_parser(selected)
    args = parser.parse_args(argv)
    module = importlib.import_module(COMMANDS[args.command][0])
    try:
        return int(module.run(args) or 0)
    except CairnError as exc:
        print(f"cairn {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"cairn {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
