"""`cairn train` end to end on a tiny prepared data set, and the pieces of the training loop."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch

from service.cli import main
from offline.data.dataset import PreparedData, SessionSplit
from offline.model.gru import GRUConfig, NextClickGRU, load_checkpoint
from offline.evaluate.gru_scorer import load_torch_scorer
from offline.model.losses import LOSS_NAMES
from offline.model.train import AUTO, AUTO_ALL_UP_TO, AUTO_SAMPLED, resolve_negatives, validate

# Ten fixed click paths A -> B -> C over 30 items: after A the next click is always B, after B always C.
PATHS = [[3 * k, 3 * k + 1, 3 * k + 2] for k in range(10)]
SMALL = ["--threads", "1", "--batch-size", "16", "--negatives", "8", "--hidden-size", "16", "--embedding-size", "16", "--lr", "0.2"]


def split(n: int, seed: int) -> SessionSplit:
    rng = np.random.default_rng(seed)
    return SessionSplit.from_sessions([PATHS[i] for i in rng.integers(0, len(PATHS), n)])


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("prepared")
    PreparedData(
        train=split(300, 0), valid=split(40, 1), test=split(20, 2), item_ids=[f"seed-pack-{i}" for i in range(30)]
    ).save(folder)
    return folder


def train(data_dir: Path, out: Path, *flags: str) -> int:
    return main(["train", "--data", str(data_dir), "--out", str(out), *SMALL, *flags])


def ranks_next_click_first(path: Path) -> bool:
    scorer = load_torch_scorer(path)
    scorer.begin(len(PATHS))
    after_a = scorer.advance(np.array([p[0] for p in PATHS]))  # [10, 30]
    after_b = scorer.advance(np.array([p[1] for p in PATHS]))
    return after_a.argmax(1).tolist() == [p[1] for p in PATHS] and after_b.argmax(1).tolist() == [p[2] for p in PATHS]


def test_train_writes_checkpoints_that_rebuild_a_model_that_learned(data_dir: Path, tmp_path: Path) -> None:
    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0", "--loss", "bpr-max") == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["best.pt", "epoch-001.pt", "epoch-002.pt", "training_log.jsonl"]
    model, extra = load_checkpoint(tmp_path / "epoch-002.pt")
    assert isinstance(model, NextClickGRU) and model.config.n_items == 30 and model.config.hidden_size == 16
    hp = extra["hyperparameters"]
    assert hp["loss"] == "bpr-max" and hp["negatives"] == 8 and hp["lr"] == 0.2 and hp["batch_size"] == 16
    assert {"negative_skew", "score_penalty", "optimizer", "epochs", "patience", "seed", "layers", "ff_sizes",
            "input_dropout", "state_dropout", "tie_output", "embedding_size", "data", "out"} <= set(hp)
    assert extra["valid"]["events"] == 80 and 0.0 <= extra["valid"]["mrr@20"] <= 1.0
    _, first = load_checkpoint(tmp_path / "epoch-001.pt")
    assert extra["train"]["train_loss"] < first["train"]["train_loss"]
    assert ranks_next_click_first(tmp_path / "best.pt")


@pytest.mark.parametrize("flags", [["--loss", name] for name in LOSS_NAMES] + [["--optimizer", "adam", "--lr", "0.02"]])
def test_every_loss_and_optimiser_learns_the_paths(data_dir: Path, tmp_path: Path, flags: list[str]) -> None:
    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0", *flags) == 0
    first, second = (load_checkpoint(tmp_path / f"epoch-00{e}.pt")[1] for e in (1, 2))
    assert second["train"]["train_loss"] < first["train"]["train_loss"]
    # Ranking the 30 items at random gives MRR@20 = (1/30) sum_{k<=20} 1/k, about 0.12; the
    # paths are deterministic, so a model that learned them ranks the next click first or second.
    assert load_checkpoint(tmp_path / "best.pt")[1]["valid"]["mrr@20"] > 0.9


def test_every_item_as_negatives_learns_the_paths_and_is_recorded(data_dir: Path, tmp_path: Path) -> None:
    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0", "--loss", "cross-entropy", "--negatives", "all") == 0
    _, extra = load_checkpoint(tmp_path / "best.pt")
    assert extra["hyperparameters"]["negatives"] == "all"
    assert extra["valid"]["mrr@20"] > 0.9  # see the paths test above for why 0.9
    assert ranks_next_click_first(tmp_path / "best.pt")


def test_auto_negatives_score_every_item_of_a_small_catalogue(data_dir: Path, tmp_path: Path) -> None:
    assert train(data_dir, tmp_path, "--epochs", "1", "--negatives", "auto") == 0  # the last --negatives wins
    assert load_checkpoint(tmp_path / "best.pt")[1]["hyperparameters"]["negatives"] == "all"  # 30 items
    assert resolve_negatives(AUTO, AUTO_ALL_UP_TO) == "all"
    assert resolve_negatives(AUTO, AUTO_ALL_UP_TO + 1) == AUTO_SAMPLED
    assert resolve_negatives(64, 30) == 64 and resolve_negatives("all", 10**6) == "all"


def test_same_seed_same_weights_other_seed_other_weights(data_dir: Path, tmp_path: Path) -> None:
    for name, seed in (("a", "7"), ("b", "7"), ("c", "8")):
        assert train(data_dir, tmp_path / name, "--epochs", "1", "--seed", seed, "--state-dropout", "0.2") == 0
    a, b, c = (load_checkpoint(tmp_path / n / "epoch-001.pt")[0].state_dict() for n in "abc")
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert not all(torch.equal(a[k], c[k]) for k in a)


def test_early_stopping_follows_patience_and_best_is_the_best_epoch(data_dir: Path, tmp_path: Path) -> None:
    assert train(data_dir, tmp_path, "--epochs", "6", "--patience", "1") == 0
    epochs = sorted(tmp_path.glob("epoch-*.pt"))
    mrr = [load_checkpoint(p)[1]["valid"]["mrr@20"] for p in epochs]
    assert len(mrr) < 6  # this data is learned at once, so the run must stop early
    best, since = -1.0, 0
    for e, value in enumerate(mrr, start=1):
        since = 0 if value > best else since + 1
        best = max(best, value)
        assert (since >= 1) == (e == len(mrr))  # stopped at the first epoch without improvement
    _, best_extra = load_checkpoint(tmp_path / "best.pt")
    assert best_extra["epoch"] == int(np.argmax(mrr)) + 1


def test_validation_mrr_equals_a_session_by_session_count(data_dir: Path) -> None:
    torch.manual_seed(3)
    model = NextClickGRU(GRUConfig(n_items=30, embedding_size=8, hidden_size=8))
    valid = PreparedData.load(data_dir).valid
    metrics = validate(model, valid)
    reciprocal, hits, events = 0.0, 0, 0
    with torch.no_grad():  # MRR@20 and Recall@20 by their definition, one session and one click at a time
        for session in valid.sessions():
            h = model.init_hidden(1)
            for t in range(len(session) - 1):
                f, h = model.step(torch.tensor([int(session[t])]), h)
                s = model.score_all(f)[0]
                rank = int((s > s[int(session[t + 1])]).sum()) + 1
                events += 1
                if rank <= 20:
                    hits += 1
                    reciprocal += 1.0 / rank
    assert metrics["events"] == events
    assert metrics["mrr@20"] == pytest.approx(reciprocal / events, rel=1e-9)
    assert metrics["recall@20"] == pytest.approx(hits / events, rel=1e-9)
    assert model.training  # validation hands the model back in train mode


@pytest.mark.parametrize(
    ("flags", "message"),
    [
        (["--batch-size", "500"], "--batch-size 500 is larger than the 300 training sessions"),
        (["--tie-output", "--ff-sizes", "8"], "--tie-output needs the last layer size (8"),
    ],
)
def test_unusable_settings_give_one_line_and_exit_2(
    data_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], flags: list[str], message: str
) -> None:
    assert main(["train", "--data", str(data_dir), "--out", str(tmp_path), *flags]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("cairn train: error:") and message in err and "\n" not in err
    assert not list(tmp_path.iterdir())


def test_missing_data_and_bad_values_are_named(
    data_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["train", "--data", str(tmp_path / "nope")]) == 2
    assert "nope: no prepared data set here" in capsys.readouterr().err
    (tmp_path / "a-file").write_text("")
    assert train(data_dir, tmp_path / "a-file", "--epochs", "1") == 2
    assert "cannot write checkpoints into" in capsys.readouterr().err
    for flag, value in (("--lr", "0"), ("--negatives", "-1"), ("--negatives", "most"), ("--state-dropout", "1.5"), ("--ff-sizes", "8,x")):
        with pytest.raises(SystemExit) as stop:
            main(["train", "--data", str(tmp_path), flag, value])
        assert stop.value.code == 2
        assert f"argument {flag}: '{value.split(',')[-1]}'" in capsys.readouterr().err


def test_each_run_leaves_an_epoch_log_readable_without_torch(data_dir: Path, tmp_path: Path) -> None:
    from offline.model.train import EPOCH_LOG

    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0") == 0
    assert train(data_dir, tmp_path, "--epochs", "2", "--patience", "0") == 0  # a second run replaces the log
    lines = (tmp_path / EPOCH_LOG).read_text().splitlines()
    records = [json.loads(line) for line in lines]  # plain JSON Lines: no torch needed to read them
    assert [r["epoch"] for r in records] == [1, 2]
    for r in records:
        assert {"train_loss", "train_clicks", "clicks_per_second", "valid", "seconds", "finished_at"} <= set(r)
        assert r["valid"]["mrr@20"] >= 0 and r["clicks_per_second"] > 0 and r["seconds"] > 0


def test_progress_in_a_pipe_is_plain_lines() -> None:
    from offline.model.progress import LineProgress

    lines: list[str] = []
    bar = LineProgress(total=1000, desc="epoch 3", every_s=0.0, write=lines.append)
    bar.set_postfix(loss="1.2500")
    bar.update(250)
    assert lines[-1].startswith("epoch 3: 25% (250 of 1,000 clicks), ") and lines[-1].endswith("loss 1.2500")
    assert "\r" not in "".join(lines)


def test_training_validates_on_the_sample_and_says_so(data_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from offline.model.train import EPOCH_LOG

    assert train(data_dir, tmp_path, "--epochs", "1", "--valid-sessions", "10") == 0
    assert "validating on 10 of 40 validation sessions" in capsys.readouterr().out
    record = json.loads((tmp_path / EPOCH_LOG).read_text().splitlines()[0])
    assert record["valid"]["events"] == 10 * 2  # ten three-click paths: two next clicks each
    assert train(data_dir, tmp_path / "all", "--epochs", "1", "--valid-sessions", "0") == 0
    assert json.loads((tmp_path / "all" / EPOCH_LOG).read_text().splitlines()[0])["valid"]["events"] == 40 * 2
    with pytest.raises(SystemExit):
        main(["train", "--data", str(data_dir), "--valid-sessions", "-3"])
    assert "argument --valid-sessions: '-3'" in capsys.readouterr().err
