"""The serving image's dependency list, checked without a container engine: it matches the
package's core dependencies, and installed into a fresh virtual environment with the package
(no extras, only `service/` copied, as the Dockerfile does) it serves a click with no torch.

Slow (one pip install from the package index, tens of seconds); kept to one install.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import tomllib
import urllib.error
import urllib.request
from pathlib import Path

from packaging.requirements import Requirement

from tests._support.servers import environment_without_cairn, free_port, running_process

ROOT = Path(__file__).resolve().parents[2]
REQUIREMENTS = ROOT / "docker" / "requirements-serve.txt"


def _requirements() -> list[Requirement]:
    lines = [ln.split("#", 1)[0].strip() for ln in REQUIREMENTS.read_text(encoding="utf-8").splitlines()]
    return [Requirement(ln) for ln in lines if ln]


def test_serving_pins_satisfy_the_core_dependencies_and_nothing_more() -> None:
    # Requirement and specifier semantics from `packaging` (PEP 508, PEP 440).
    core = [Requirement(r) for r in tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]["dependencies"]]
    pinned = {r.name.lower(): r for r in _requirements()}
    assert set(pinned) == {r.name.lower() for r in core}
    for req in core:
        pin = pinned[req.name.lower()]
        [spec] = list(pin.specifier)
        assert spec.operator == "==", pin
        assert req.specifier.contains(spec.version), f"{pin} is outside pyproject's {req}"
        assert str(pin.marker) == str(req.marker) if req.marker else pin.marker is None
    assert not {"torch", "onnx", "polars"} & set(pinned)


def test_the_image_copies_service_whole_and_nothing_beside_it() -> None:
    # service/ is the serving process and nothing else: the image deletes nothing after copying it.
    dockerfile = (ROOT / "docker" / "Dockerfile").read_text(encoding="utf-8")
    copies = [ln.split()[1] for ln in dockerfile.splitlines() if ln.startswith("COPY ") and "--from" not in ln]
    assert "service" in copies and not {"offline", "bench", "loadtest"} & set(copies)
    assert "rm -rf" not in dockerfile


def test_serving_requirements_install_fresh_and_serve_without_torch(tmp_path: Path) -> None:
    from offline.export.artifact_writer import write_random_artifact

    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    shutil.copytree(ROOT / "service", src / "service", ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))

    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=120)
    py = venv / "bin" / "python"
    install = subprocess.run(
        [str(py), "-m", "pip", "install", "-q", "--disable-pip-version-check", "-r", str(REQUIREMENTS), str(src)],
        capture_output=True,
        text=True,
        timeout=540,
    )
    assert install.returncode == 0, install.stdout[-3000:] + install.stderr[-3000:]
    no_torch = subprocess.run([str(py), "-c", "import torch"], capture_output=True, text=True, timeout=60)
    assert no_torch.returncode != 0 and "No module named 'torch'" in no_torch.stderr
    # The workbench's commands are not in the serving install: one clear line, not a traceback.
    workbench = subprocess.run([str(venv / "bin" / "cairn"), "train", "--help"], capture_output=True, text=True, timeout=60)
    assert workbench.returncode == 2 and "not part of this installation" in workbench.stderr, workbench.stderr
    assert "Traceback" not in workbench.stderr

    store = tmp_path / "model_store"
    write_random_artifact(store, "shop", "v1", n_items=50, hidden_size=8, neighbours=5, seed=0)
    port = free_port()
    base = f"http://127.0.0.1:{port}"

    def healthy() -> bool:
        with urllib.request.urlopen(f"{base}/healthz", timeout=2) as resp:
            return resp.status == 200

    with running_process(
        [str(venv / "bin" / "cairn"), "serve", "--host", "127.0.0.1", "--port", str(port), "--workers", "1"],
        log_path=tmp_path / "serve.log", ready=healthy, what="cairn serve in the fresh environment", ignore=(urllib.error.URLError, OSError),
        poll_s=0.2, env=environment_without_cairn(CAIRN_ARTIFACTS=str(store), CAIRN_RECOMMENDER="gru", CAIRN_SESSION_STORE="memory", CAIRN_PAGES="true"),
        cwd=tmp_path, group=True,
    ):  # fmt: skip
        body = json.dumps({"item_id": "sku-000007", "count": 3, "exclude_seen": False}).encode()
        request = urllib.request.Request(
            f"{base}/v1/sessions/fresh-venv-1/clicks", data=body, method="POST", headers={"Content-Type": "application/json"}
        )
        with urllib.request.urlopen(request, timeout=10) as resp:
            answer = json.loads(resp.read())
            assert resp.status == 200
        assert answer["session_id"] == "fresh-venv-1"
        assert answer["served_by"] == "gru" and answer["fallback_reason"] is None
        assert len(answer["items"]) == 3
        # The pages' templates and static files are package data: a plain (non-editable) install carries them.
        for path, kind in (("/shop/", "text/html"), ("/operator/", "text/html"), ("/pages/static/pages.js", "javascript")):
            with urllib.request.urlopen(f"{base}{path}", timeout=10) as resp:
                assert resp.status == 200 and kind in resp.headers["content-type"], path
