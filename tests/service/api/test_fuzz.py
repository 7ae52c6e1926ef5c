"""The live OpenAPI document, fuzzed with schemathesis (every check enabled): no 5xx, no answer
that disagrees with the document, no schema-valid request refused. A bounded, deterministic run
here; `make fuzz` runs a long random one (FUZZ_EXAMPLES, default 2000 per operation)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from service.config import Settings
from tests._support.servers import TOKEN, serve_in_thread

SCHEMATHESIS = Path(sys.executable).with_name("schemathesis")


def fuzz(url: str, examples: int, deterministic: bool) -> subprocess.CompletedProcess:
    command = [
        str(SCHEMATHESIS), "run", f"{url}/openapi.json", "--checks", "all", "-n", str(examples),
        "-H", f"Authorization: Bearer {TOKEN}", "--request-timeout", "10",
    ]  # fmt: skip
    if deterministic:
        command.append("--generation-deterministic")
    return subprocess.run(command, capture_output=True, text=True, timeout=1800, env={**os.environ, "NO_COLOR": "1"})


def test_the_openapi_document_holds_under_fuzzing(tmp_path: Path) -> None:
    from offline.export.artifact_writer import write_random_artifact

    write_random_artifact(tmp_path, "shop", "v1", n_items=50, hidden_size=8, neighbours=5)
    examples = int(os.environ.get("FUZZ_EXAMPLES", "25"))
    settings = Settings(artifacts=tmp_path, admin_token=TOKEN, log_level="error")
    with serve_in_thread(settings) as running:
        run = fuzz(running.url, examples, deterministic="FUZZ_EXAMPLES" not in os.environ)
    assert run.returncode == 0, run.stdout[-6000:] + run.stderr[-2000:]
    assert "No issues found" in run.stdout, run.stdout[-3000:]
