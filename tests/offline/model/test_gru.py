"""The GRU model and its torch scorer.

The recurrence is checked against the GRU equations as the PyTorch documentation gives them for
`torch.nn.GRU` (https://pytorch.org/docs/stable/generated/torch.nn.GRU.html):
    r = sigmoid(W_ir x + b_ir + W_hr h + b_hr)
    z = sigmoid(W_iz x + b_iz + W_hz h + b_hz)
    n = tanh(W_in x + b_in + r * (W_hn h + b_hn))
    h' = (1 - z) * n + z * h
with weight_ih_l{k} = [W_ir | W_iz | W_in] and weight_hh_l{k} = [W_hr | W_hz | W_hn] stacked by rows.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch

from service.errors import ArtifactError
from offline.model.gru import GRUConfig, NextClickGRU, load_checkpoint, save_checkpoint
from offline.evaluate.gru_scorer import TorchGRUScorer, load_torch_scorer


def sigmoid(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def numpy_step(model: NextClickGRU, items: np.ndarray, hidden: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One click by hand from the module's weights: (scores [B, n_items], features [B, D], new hidden [L, B, H])."""
    sd = {k: v.detach().double().numpy() for k, v in model.state_dict().items()}
    c = model.config
    x = sd["embedding.weight"][items]  # [B, E]
    new_hidden = []
    for k in range(c.layers):
        w_ir, w_iz, w_in = np.split(sd[f"gru.weight_ih_l{k}"], 3)
        w_hr, w_hz, w_hn = np.split(sd[f"gru.weight_hh_l{k}"], 3)
        b_ir, b_iz, b_in = np.split(sd[f"gru.bias_ih_l{k}"], 3)
        b_hr, b_hz, b_hn = np.split(sd[f"gru.bias_hh_l{k}"], 3)
        h = hidden[k]
        r = sigmoid(x @ w_ir.T + b_ir + h @ w_hr.T + b_hr)
        z = sigmoid(x @ w_iz.T + b_iz + h @ w_hz.T + b_hz)
        n = np.tanh(x @ w_in.T + b_in + r * (h @ w_hn.T + b_hn))
        h = (1.0 - z) * n + z * h
        new_hidden.append(h)
        x = h  # the next layer's input
    f = x
    for i in range(len(c.ff_sizes)):
        f = np.tanh(f @ sd[f"ff.{i}.weight"].T + sd[f"ff.{i}.bias"])
    out = sd["embedding.weight"] if c.tie_output else sd["output.weight"]
    scores = f @ out.T + sd["output_bias.weight"][:, 0]
    return scores, f, np.stack(new_hidden)


def make_model(**kw: object) -> NextClickGRU:
    torch.manual_seed(0)
    model = NextClickGRU(GRUConfig(**{"n_items": 13, "embedding_size": 6, "hidden_size": 5, **kw}))
    with torch.no_grad():
        model.output_bias.weight.normal_()  # zero at init; random here so the bias term is checked too
    return model.eval()


@pytest.mark.parametrize(
    "kw",
    [{}, {"layers": 2}, {"ff_sizes": [4, 6], "tie_output": True}, {"layers": 3, "ff_sizes": [7]}],
    ids=["plain", "two-layers", "ff-tied", "three-layers-ff"],
)
def test_step_equals_the_documented_gru_equations(kw: dict) -> None:
    model = make_model(**kw)
    rng = np.random.default_rng(1)
    items = np.array([0, 3, 12, 3])
    hidden = rng.normal(size=(model.config.layers, 4, 5))
    with torch.no_grad():
        f, h = model.step(torch.from_numpy(items), torch.from_numpy(hidden).float())
        s = model.score_all(f)
    ref_scores, ref_f, ref_h = numpy_step(model, items, hidden)
    np.testing.assert_allclose(h.numpy(), ref_h, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(f.numpy(), ref_f, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(s.numpy(), ref_scores, rtol=1e-5, atol=1e-5)


def test_candidate_scores_are_columns_of_the_full_scores() -> None:
    for tie in (False, True):
        model = make_model(tie_output=tie, embedding_size=5)
        with torch.no_grad():
            f, _ = model.step(torch.tensor([1, 2]), model.init_hidden(2))
            cand = torch.tensor([4, 0, 4, 12])
            torch.testing.assert_close(model.score_candidates(f, cand), model.score_all(f)[:, cand])


def test_item_tables_get_sparse_gradients_touching_only_used_rows() -> None:
    model = make_model().train()
    f, _ = model.step(torch.tensor([1, 2]), model.init_hidden(2))
    model.score_candidates(f, torch.tensor([2, 5])).sum().backward()
    for table in (model.embedding, model.output, model.output_bias):
        assert table.weight.grad.is_sparse
    assert set(model.output.weight.grad.coalesce().indices()[0].tolist()) == {2, 5}


def test_checkpoint_round_trip_rebuilds_the_same_model(tmp_path: Path) -> None:
    model = make_model(layers=2, ff_sizes=[4])
    save_checkpoint(tmp_path / "m.pt", model, {"hyperparameters": {"loss": "top1"}})
    loaded, extra = load_checkpoint(tmp_path / "m.pt")
    assert loaded.config == model.config and extra == {"hyperparameters": {"loss": "top1"}}
    for key, value in model.state_dict().items():
        assert torch.equal(value, loaded.state_dict()[key]), key


def test_scorer_scores_every_item_after_each_click() -> None:
    model = make_model(input_dropout=0.5, state_dropout=0.5).train()
    scorer = TorchGRUScorer(model, "gru-test")
    clicks = [np.array([1, 7]), np.array([2, 7])]
    runs = []
    for _ in range(2):  # eval mode: dropout off, so the same clicks give the same scores
        scorer.begin(2)
        runs.append([scorer.advance(c) for c in clicks])
    hidden = np.zeros((1, 2, 5))
    for c, got in zip(clicks, runs[0]):
        expected, _, hidden = numpy_step(model, c, hidden)
        assert got.dtype == np.float32 and got.shape == (2, 13)
        np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-5)
    for a, b in zip(*runs):
        np.testing.assert_array_equal(a, b)


def test_load_torch_scorer_names_it_after_the_loss(tmp_path: Path) -> None:
    model = make_model()
    save_checkpoint(tmp_path / "best.pt", model, {"hyperparameters": {"loss": "top1-max"}})
    scorer = load_torch_scorer(tmp_path / "best.pt")
    assert scorer.name == "gru-top1-max" and scorer.n_items == 13


def test_load_torch_scorer_refuses_what_is_not_a_training_checkpoint(tmp_path: Path) -> None:
    with pytest.raises(ArtifactError, match="no checkpoint"):
        load_torch_scorer(tmp_path / "missing.pt")
    (tmp_path / "junk.pt").write_bytes(b"not a checkpoint")
    with pytest.raises(ArtifactError, match="junk.pt"):
        load_torch_scorer(tmp_path / "junk.pt")
    save_checkpoint(tmp_path / "bare.pt", make_model())
    with pytest.raises(ArtifactError, match="no training loss"):
        load_torch_scorer(tmp_path / "bare.pt")


def test_a_checkpoint_with_a_retired_option_name_is_refused_naming_both(tmp_path) -> None:
    import torch

    from offline.model.gru import load_checkpoint, save_checkpoint
    from service.errors import InputDataError

    path = tmp_path / "old.pt"
    save_checkpoint(path, make_model())
    blob = torch.load(path, weights_only=True)
    old = "dropout_" + "hidden"  # in pieces: the retired name appears nowhere else in the repository
    blob["config"][old] = blob["config"].pop("state_dropout")
    torch.save(blob, path)
    with pytest.raises(InputDataError, match=f"'{old}', now 'state_dropout'"):
        load_checkpoint(path)
