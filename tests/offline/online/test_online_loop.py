"""The loop end to end on small data: serve (events to a folder) -> `cairn events export` ->
`cairn prepare` reads the export as is -> `cairn train` (1 epoch, tiny) -> `cairn export` ->
the running service switches to the new artifact. Every step is the real command (`service.cli.main`)."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import polars as pl

from offline.export.artifact_writer import write_random_artifact
from service.cli import main as cairn
from service.config import Settings
from tests._support.servers import TOKEN, new_id, serve_in_thread

DAY_S = 86_400


def _wave(client, rng: np.random.Generator, n_sessions: int, clicks: int, tag: str) -> int:
    sent = 0
    for _ in range(n_sessions):
        session = new_id(tag)
        start = int(rng.integers(0, 20))
        for k in range(clicks):  # a walk along neighbouring items: something a model can learn
            item = f"sku-{(start + k) % 24:06d}"
            assert client.post(f"/v1/sessions/{session}/clicks", json={"item_id": item, "count": 5}).status_code == 200
            sent += 1
    return sent


def test_serve_log_export_prepare_train_switch(tmp_path: Path, capsys) -> None:
    store = tmp_path / "model_store"
    write_random_artifact(store, "shop", "v1", n_items=40, hidden_size=8, seed=0)
    events = tmp_path / "events"
    settings = Settings(
        artifacts=store, artifact_name="shop", artifact_version="v1", events=str(events), events_flush_s=0.1, admin_token=TOKEN,
    )  # fmt: skip
    rng = np.random.default_rng(5)
    with serve_in_thread(settings) as server, server.client() as c:
        # Three waves in time, so prepare's time split (test and validation: the last 3 s each) has
        # sessions in every split (the margins hold while the two short waves take under 1 s each).
        sent = _wave(c, rng, 60, 4, "train")
        time.sleep(4)
        sent += _wave(c, rng, 8, 3, "valid")
        time.sleep(4)
        sent += _wave(c, rng, 8, 3, "test")
        c.post(f"/v1/sessions/{new_id('dup')}/clicks", json={"item_id": "sku-000001", "event_id": "x"})
        c.post(f"/v1/sessions/{new_id('dup')}/clicks", json={"item_id": "sku-000001", "event_id": "x"})
        sent += 2
        time.sleep(0.3)

        clicks_csv = tmp_path / "clicks.csv"
        assert cairn(["events", "export", "--from", str(events), "--out", str(clicks_csv)]) == 0
        log = pl.read_csv(clicks_csv)
        assert log.columns == ["session_id", "item_id", "timestamp", "arm", "served_by"]
        assert log.height == sent
        assert cairn(["events", "export", "--from", str(events), "--out", str(tmp_path / "clicks.parquet")]) == 0
        assert pl.read_parquet(tmp_path / "clicks.parquet").equals(log.with_columns(pl.col("arm").fill_null("")))

        prepared = tmp_path / "prepared"
        assert cairn([
            "prepare", "--input", str(clicks_csv), "--out", str(prepared), "--session-column", "session_id",
            "--item-column", "item_id", "--time-column", "timestamp", "--min-item-clicks", "1",
            "--test-days", str(3 / DAY_S), "--valid-days", str(3 / DAY_S),
        ]) == 0  # fmt: skip
        report = capsys.readouterr().out
        assert "train" in report
        assert cairn([
            "train", "--data", str(prepared), "--out", str(tmp_path / "ck"), "--epochs", "1", "--hidden-size", "8",
            "--embedding-size", "8", "--batch-size", "4", "--threads", "1",
        ]) == 0  # fmt: skip
        assert cairn([
            "export", "--checkpoint", str(tmp_path / "ck" / "best.pt"), "--data", str(prepared), "--name", "loop",
            "--version", "v1", "--artifacts", str(store),
        ]) == 0  # fmt: skip

        r = c.put("/v1/serving", json={"name": "loop", "version": "v1"}, headers={"authorization": f"Bearer {TOKEN}"})
        assert r.status_code == 200, r.text
        body = c.post(f"/v1/sessions/{new_id('next')}/clicks", json={"item_id": "sku-000003", "count": 5}).json()
        assert (body["artifact"], body["served_by"]) == ("loop/v1", "gru")
