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
    "demo-data": ("offline.demo.demo_cli", "generate the garden-shop demo click log and its oracle"),
    "prepare": ("offline.data.prepare_cli", "turn a raw click log into train/valid/test sessions"),
    "train": ("offline.model.train_cli", "train the GRU next-click model"),
    "export": ("offline.export.export_cli", "write a model artifact into the artifacts folder"),
    "evaluate": ("offline.evaluate.evaluate_cli", "compare recommenders on the test sessions"),
    "artifacts": ("service.artifacts.artifacts_cli", "list and verify the artifacts in the artifacts folder"),
    "serve": ("service.api.serve_cli", "run the HTTP recommendation service"),
    "switch": ("service.api.switch_cli", "choose what a running service serves (artifact, recommender)"),
    "events": ("offline.online.events_cli", "the service's click events: `export` them as a click log for `cairn prepare`"),
    "experiment": ("offline.online.experiment_cli", "an online experiment's verdict: `report` from the click events"),
    "loadtest": ("loadtest.loadtest_cli", "replay held-out visits against the service and judge the page budget"),
    "capacity": ("loadtest.capacity_cli", "find the highest rate per core that meets the budget"),
    "simulate": ("loadtest.simulate_cli", "a short online experiment on the demo shop: simulated visitors, GRU vs a simple arm"),
}


def _command_module(name: str):
    """The module of subcommand `name`; a clear error where this installation lacks its package (the
    serving image holds `service/` only: the workbench, load test and benchmarks are not in it)."""
    module_name = COMMANDS[name][0]
    try:
        return importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        missing = (exc.name or "").split(".")[0]
        if missing == module_name.split(".")[0]:
            raise CairnError(
                f"`cairn {name}` is not part of this installation (it needs the {missing!r} package; "
                "the serving image has `cairn serve` and `cairn artifacts` only)"
            ) from None
        if missing and not module_name.startswith("service."):
            # The workbench's own dependencies (torch, polars, locust, ...) come with the extras.
            raise CairnError(
                f"`cairn {name}` needs {missing!r}, which is not part of this installation "
                "(install cairn with its extras: pip install 'cairn[train,dev]')"
            ) from None
        raise


def build_parser(selected: str | None = None) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="cairn", description="Next-click recommendations for anonymous visits.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (_, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if name == selected:
            _command_module(name).configure(p)
    return parser


def _innermost(parser: argparse.ArgumentParser, args: argparse.Namespace) -> argparse.ArgumentParser:
    """The parser of the subcommand (and of its action, as in `cairn artifacts verify`) that ran."""
    current = parser
    while True:
        subs = [a for a in current._actions if isinstance(a, argparse._SubParsersAction)]
        chosen = getattr(args, subs[0].dest, None) if subs else None
        if not subs or chosen not in subs[0].choices:
            return current
        current = subs[0].choices[chosen]


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    selected = next((a for a in argv if not a.startswith("-")), None)
    if selected not in COMMANDS:
        selected = None
    try:
        parser = build_parser(selected)
    except CairnError as exc:
        print(f"cairn {selected}: error: {exc}", file=sys.stderr)
        return 2
    args, extras = parser.parse_known_args(argv)
    if extras:
        # argparse would blame the top-level parser and print its usage; the subcommand's is the help.
        _innermost(parser, args).error(f"unrecognized arguments: {' '.join(extras)}")
    module = _command_module(args.command)
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
