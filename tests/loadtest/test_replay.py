"""Visits from a prepared data set: clicks, the log's gaps, the workers' shares."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service.errors import InputDataError
from loadtest.replay import VisitSet, visits_from_data
from offline.data.dataset import PreparedData, SessionSplit


@pytest.fixture()
def data(tmp_path: Path) -> Path:
    ids = ["rake", "hoe", "trowel", "shears"]
    test = SessionSplit.from_sessions([[0, 1, 1], [3], [2, 0]], [[100, 104, 130], [50], [7, 7]])
    empty = SessionSplit.from_sessions([[0]], [[0]])
    PreparedData(train=empty, valid=empty, test=test, item_ids=ids).save(tmp_path / "d")
    return tmp_path / "d"


def test_visits_keep_clicks_and_the_gaps_between_them(data: Path, tmp_path: Path) -> None:
    v = visits_from_data(data)
    assert v.n_visits == 3 and v.n_clicks == 6
    assert v.clicks(0) == ["rake", "hoe", "hoe"] and v.clicks(1) == ["shears"] and v.clicks(2) == ["trowel", "rake"]
    assert v.visit_gaps(0) == [0.0, 4.0, 26.0]  # seconds since the visit's previous click
    assert v.visit_gaps(2) == [0.0, 0.0]
    v.save(tmp_path / "v.npz")
    back = VisitSet.load(tmp_path / "v.npz")
    assert back.item_ids == v.item_ids and all(back.clicks(i) == v.clicks(i) for i in range(3))
    assert np.array_equal(back.gaps, v.gaps) and np.array_equal(back.source, v.source)
    assert visits_from_data(data, max_visits=2).n_visits == 2


def test_worker_shares_are_disjoint_and_cover_every_visit(data: Path) -> None:
    v = visits_from_data(data)
    shares = [v.share(w, 2) for w in range(2)]
    assert shares == [[0, 2], [1]]
    assert v.share(0, 1) == [0, 1, 2]
    assert v.share(3, 4) == []


def test_bad_data_is_named(data: Path, tmp_path: Path) -> None:
    with pytest.raises(InputDataError, match="'holdout'"):
        visits_from_data(data, split="holdout")
    with pytest.raises(InputDataError, match="0"):
        visits_from_data(data, max_visits=0)
    with pytest.raises(InputDataError, match=str(tmp_path / "none")):
        visits_from_data(tmp_path / "none")
