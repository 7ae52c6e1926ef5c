"""Fixtures of the page tests: artifacts with the demo shop's names (and one with hostile ids),
models made slow or failing by a small wrapper class, the app on a real uvicorn, and Debian's
chromium driven headless through chromium-driver by Selenium (never a downloaded browser).
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import load_artifact, write_artifact
from tests._support.faults import ModelFault
from tests._support.servers import RunningServer, serve_in_thread, shop_settings

N_ITEMS = 300
HIDDEN = 16
# Ids and names a page must show as text, never run: script, markup, attribute breakers, entities.
HOSTILE_IDS = ['<script>document.title="owned"</script>', '"><img src=x onerror="document.title=\'owned\'">']
HOSTILE_NAME = "<b>Rake</b> & \"spade\" <script>document.title='owned'</script>"


@pytest.fixture(scope="session")
def pages_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """garden/v1: the demo shop's generated item ids and names on a random model's tables;
    hostile/v1: the same with two hostile ids (the most popular items) and a hostile name."""
    from offline.demo.catalogue import build_catalogue
    from offline.demo.params import ScenarioParams
    from offline.export.artifact_writer import write_random_artifact

    store = tmp_path_factory.mktemp("pages_store")
    base = load_artifact(write_random_artifact(store, "random", "v1", n_items=N_ITEMS, hidden_size=HIDDEN, seed=3))
    graph = base.step_graph.read_bytes()
    catalogue = build_catalogue(ScenarioParams(items=N_ITEMS), np.random.default_rng(7))
    fields = {"model": base.manifest["model"], "metrics": {}}
    tables = (base.neighbour_items, base.neighbour_scores)
    # The step graph keeps its item tables in files beside it (ONNX external data): they come along.
    extras = {f: (base.path / f).read_bytes() for f in base.manifest["files"] if f.endswith(".npy") and f != "popularity.npy"}
    write_artifact(
        store, "garden", "v1", graph, catalogue.item_ids, *tables, base.popularity, fields,
        item_names=dict(zip(catalogue.item_ids, catalogue.names)), extra_files=extras,
    )  # fmt: skip
    ids = list(catalogue.item_ids)
    popularity = base.popularity.copy()
    top = np.argsort(-popularity)[:2]
    for index, hostile in zip(top, HOSTILE_IDS):
        ids[index] = hostile
    names = dict(zip(ids, catalogue.names))
    names[HOSTILE_IDS[0]] = HOSTILE_NAME
    write_artifact(store, "hostile", "v1", graph, ids, *tables, popularity, fields, item_names=names, extra_files=extras)
    return store


@pytest.fixture()
def pages_server(pages_store: Path) -> Iterator:
    """`pages_server(name="garden", wrap_model=None, **settings)`: the app with CAIRN_PAGES on."""
    import contextlib

    stack = contextlib.ExitStack()

    def start(name: str = "garden", wrap_model=None, **overrides: object) -> RunningServer:
        settings = shop_settings(pages_store, "memory", tag="p", artifact_name=name, pages=True, log_level="warning", **overrides)
        return stack.enter_context(serve_in_thread(settings, wrap_model=wrap_model))

    with stack:
        yield start


def _find(name: str) -> str:
    path = shutil.which(name) or (f"/usr/bin/{name}" if Path(f"/usr/bin/{name}").exists() else None)
    if path is None:
        pytest.fail(f"{name} is not installed: `make test` installs Debian's chromium and chromium-driver")
    return path


@pytest.fixture(scope="module")
def browser() -> Iterator:
    """Debian's chromium, headless, through Debian's chromium-driver (given by path, so Selenium never downloads one)."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = _find("chromium")
    for arg in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--disable-gpu", "--window-size=1360,1000"):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})  # the console, read by `console_errors`
    driver = webdriver.Chrome(service=Service(_find("chromedriver")), options=options)
    driver.set_page_load_timeout(20)
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="session")
def screenshots(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Screenshots go into this run's output folder (pytest's base temporary folder)."""
    return tmp_path_factory.mktemp("screenshots", numbered=False)


@pytest.fixture(scope="session")
def kit_fault():
    """`kit_fault(delay_s=...)`: a new ModelFault (test modules cannot import one another here)."""
    return ModelFault


@pytest.fixture(scope="session")
def hostile() -> tuple[list[str], str]:
    """The hostile ids (the two most popular items of hostile/v1) and the hostile name of the first."""
    return HOSTILE_IDS, HOSTILE_NAME


def console_errors(browser) -> list[str]:
    """Errors the page's console got since the last call: script errors, CSP violations, failed loads."""
    return [e["message"] for e in browser.get_log("browser") if e["level"] == "SEVERE"]


@pytest.fixture(scope="session")
def console():
    return console_errors
