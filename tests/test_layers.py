"""The package layout's rules (shared/DESIGN.md): imports run one way, and the service stays lean.

- import-linter (a well-kept import-contract library) checks the contracts in pyproject.toml:
  loadtest > bench > offline > service, each importing only those below it; `service` never
  imports torch, polars, onnx, scipy, locust or matplotlib.
- The app, imported in a fresh interpreter, has not loaded torch or polars (a lazy import inside a
  function would pass the static check but still load them at start-up).
- service/errors.py's docstring draws the whole exception tree: every subclass is named there.
"""

from __future__ import annotations

import inspect
import subprocess
import sys
from pathlib import Path

import service.errors as errors

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_hold() -> None:
    lint = Path(sys.executable).with_name("lint-imports")
    run = subprocess.run([str(lint), "--config", str(ROOT / "pyproject.toml")], capture_output=True, text=True, cwd=ROOT, timeout=300)
    assert run.returncode == 0, run.stdout[-4000:] + run.stderr[-2000:]
    assert "2 kept, 0 broken" in run.stdout


def test_the_serving_app_loads_neither_torch_nor_polars() -> None:
    code = (
        "import sys; import service.api.app, service.cli, service.api.serve_cli; "
        "bad = sorted(m for m in ('torch', 'polars', 'onnx', 'scipy', 'offline', 'loadtest', 'bench') if m in sys.modules); "
        "print(','.join(bad))"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == ""


def test_the_exception_tree_docstring_names_every_error() -> None:
    classes = [c for _, c in inspect.getmembers(errors, inspect.isclass) if issubclass(c, errors.CairnError)]
    assert len(classes) >= 12
    doc = errors.__doc__ or ""
    for cls in classes:
        assert cls.__name__ in doc, f"{cls.__name__} is missing from service/errors.py's tree"
    # ...and every CairnError subclass anywhere in the four packages is one of these.
    for package in ("service", "offline", "loadtest", "bench"):
        for path in (ROOT / package).rglob("*.py"):
            text = path.read_text(encoding="utf-8")
            assert "(CairnError):" not in text or path.name == "errors.py", f"{path}: define errors in service/errors.py"
