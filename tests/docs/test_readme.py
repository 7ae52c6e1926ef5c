"""The README stays true: its settings table lists every setting the settings object has (and no
other), and its curl examples run against a live server with the answers it shows."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

from service.config import Settings

README = Path(__file__).resolve().parents[2] / "README.md"


def _settings_table() -> set[str]:
    text = README.read_text(encoding="utf-8")
    start = text.index("| setting | default | meaning |")
    rows = []
    for line in text[start:].splitlines()[2:]:
        if not line.startswith("|"):
            break
        rows.append(line.split("|")[1])
    return set(re.findall(r"`(CAIRN_[A-Z0-9_]+)`", "".join(rows)))


def test_the_settings_table_lists_every_setting_and_only_those() -> None:
    documented = _settings_table()
    actual = {f"CAIRN_{name.upper()}" for name in Settings.model_fields}
    assert not actual - documented, f"missing from the README's settings table: {sorted(actual - documented)}"
    assert not documented - actual, f"in the README's settings table but not settings: {sorted(documented - actual)}"


def _curl_examples() -> list[list[str]]:
    """The curl commands of the README's Endpoints block, as argument lists (continuation lines joined)."""
    text = README.read_text(encoding="utf-8")
    block = text[text.index("### Endpoints") :]
    block = block[block.index("```") + 3 : block.index("```", block.index("```") + 3)]
    joined = block.replace("\\\n", " ")
    commands = []
    for line in joined.splitlines():
        for part in line.split(";"):
            part = part.strip()
            if part.startswith("curl "):
                commands.append(shlex.split(part))
    return commands


def _as_request(args: list[str], base: str, token: str) -> tuple[str, str, dict[str, str], str | None]:
    method, headers, data, url = "GET", {}, None, None
    i = 1
    while i < len(args):
        a = args[i]
        if a == "-s":
            pass
        elif a == "-X":
            method = args[i + 1]
            i += 1
        elif a == "-H":
            name, _, value = args[i + 1].partition(":")
            headers[name.strip()] = value.strip().replace("$CAIRN_ADMIN_TOKEN", token)
            i += 1
        elif a == "-d":
            data = args[i + 1]
            i += 1
        else:
            url = a
        i += 1
    assert url is not None and url.startswith("localhost:8000/"), url
    return method, base + url.removeprefix("localhost:8000"), headers, data


def test_the_curl_examples_run_against_a_live_server(tmp_path: Path) -> None:
    import httpx

    from offline.export.artifact_writer import write_random_artifact
    from tests._support.servers import TOKEN, serve_in_thread

    # The examples name the demo's artifact and item ids: a random artifact with the same names.
    ids = [f"GS-{i:05d}" for i in range(500)]
    write_random_artifact(tmp_path, "garden-gru", "v1", n_items=500, hidden_size=8, neighbours=5, item_ids=ids)
    write_random_artifact(tmp_path, "garden-gru", "demo", n_items=500, hidden_size=8, neighbours=5, item_ids=ids)
    commands = _curl_examples()
    assert len(commands) >= 7
    with serve_in_thread(Settings(artifacts=tmp_path, artifact_version="demo", admin_token=TOKEN, log_level="error")) as running:
        with httpx.Client(timeout=10) as client:
            for args in commands:
                method, url, headers, data = _as_request(args, running.url, TOKEN)
                r = client.request(method, url, headers=headers, content=data)
                assert r.status_code in (200, 204), (args, r.status_code, r.text)
                if "/clicks" in url:
                    answer = r.json()
                    shown = json.loads(_shown_answer())
                    assert set(answer) == set(shown), "the README's example answer has other fields than the service's"
                    assert answer["artifact"] == shown["artifact"] and answer["served_by"] == shown["served_by"]


def _shown_answer() -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index('{"session_id":"visit-1"')
    end = text.index("}\n", text.index('"recorded"', start)) + 1
    return re.sub(r"\s*\n\s*", "", text[start:end])
