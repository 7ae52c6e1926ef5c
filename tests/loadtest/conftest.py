"""Fixtures of the load-tool tests: a small random artifact and held-out visits over its items.

The load tests start the real service (`cairn serve` as a subprocess on a free loopback port)
and real Locust processes; they run a few seconds of load each. The service starts from no CAIRN_
variables of the shell (tests/conftest.py clears them).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service.artifacts.format import load_artifact
from offline.data.dataset import PreparedData, SessionSplit

N_ITEMS = 60
NEIGHBOURS = 20  # > any count the tests ask for, so a neighbours answer is one table row's head


@pytest.fixture(scope="session")
def model_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from offline.export.artifact_writer import write_random_artifact

    store = tmp_path_factory.mktemp("load_model_store")
    write_random_artifact(store, "demo", "v1", n_items=N_ITEMS, hidden_size=16, neighbours=NEIGHBOURS, seed=3)
    return store


@pytest.fixture(scope="session")
def artifact_path(model_store: Path) -> Path:
    return model_store / "demo" / "v1"


@pytest.fixture(scope="session")
def visits_data(tmp_path_factory: pytest.TempPathFactory, artifact_path: Path) -> Path:
    """A prepared data set over the artifact's items: 30 test visits of 1-7 clicks, gaps of 0-4 s."""
    item_ids = load_artifact(artifact_path).item_ids
    rng = np.random.default_rng(11)

    def split(n: int) -> SessionSplit:
        sessions = [rng.integers(0, N_ITEMS, size=int(rng.integers(1, 8))).tolist() for _ in range(n)]
        times = [(1_700_000_000 + np.cumsum(rng.integers(0, 5, size=len(s)))).tolist() for s in sessions]
        return SessionSplit.from_sessions(sessions, times)

    folder = tmp_path_factory.mktemp("load_data") / "prepared"
    PreparedData(train=split(40), valid=split(10), test=split(30), item_ids=item_ids).save(folder)
    return folder
