"""The training step's GRU (gru_cell.gru_step) against torch.nn.GRU itself.

Reference: `torch.nn.GRU` run on a sequence of length one (PyTorch's own implementation of the
equations in its documentation), and its autograd gradients; `torch.autograd.gradcheck`
(numerical derivatives, PyTorch) for the hand-written backward.
"""

from __future__ import annotations

import pytest
import torch

from offline.model.gru import GRUConfig, NextClickGRU
from offline.model.gru_cell import gru_step


def grus(layers: int) -> tuple[torch.nn.GRU, torch.nn.GRU]:
    torch.manual_seed(4)
    ref = torch.nn.GRU(5, 7, num_layers=layers).double()
    ours = torch.nn.GRU(5, 7, num_layers=layers).double()
    ours.load_state_dict(ref.state_dict())
    return ref, ours


@pytest.mark.parametrize("layers", [1, 2])
def test_output_and_gradients_equal_nn_gru(layers: int) -> None:
    ref, ours = grus(layers)
    g = torch.Generator().manual_seed(0)
    x = torch.randn(6, 5, dtype=torch.float64, generator=g)
    h = torch.randn(layers, 6, 7, dtype=torch.float64, generator=g)
    weights = torch.randn(6, 7, dtype=torch.float64, generator=g)  # a loss that weighs every output differently
    x_ref, h_ref = x.clone().requires_grad_(), h.clone().requires_grad_()
    out_ref, hidden_ref = ref(x_ref.unsqueeze(0), h_ref)
    ((out_ref[0] * weights).sum() + hidden_ref.sum()).backward()
    x_ours, h_ours = x.clone().requires_grad_(), h.clone().requires_grad_()
    out_ours, hidden_ours = gru_step(ours, x_ours, h_ours)
    ((out_ours * weights).sum() + hidden_ours.sum()).backward()
    torch.testing.assert_close(out_ours, out_ref[0])
    torch.testing.assert_close(hidden_ours, hidden_ref)
    torch.testing.assert_close(x_ours.grad, x_ref.grad)
    torch.testing.assert_close(h_ours.grad, h_ref.grad)
    for (name, p), q in zip(ref.named_parameters(), ours.parameters()):
        torch.testing.assert_close(q.grad, p.grad, msg=name)


def test_backward_matches_finite_differences() -> None:
    _, ours = grus(2)
    g = torch.Generator().manual_seed(1)
    x = torch.randn(3, 5, dtype=torch.float64, generator=g, requires_grad=True)
    h = torch.randn(2, 3, 7, dtype=torch.float64, generator=g, requires_grad=True)
    params = tuple(ours.parameters())
    assert torch.autograd.gradcheck(lambda a, b, *_: gru_step(ours, a, b), (x, h, *params))


def test_without_a_hidden_gradient_only_the_rest_is_computed() -> None:
    # The trainer detaches the hidden state every step: h needs no gradient, the rest still gets it.
    ref, ours = grus(1)
    x = torch.randn(4, 5, dtype=torch.float64, requires_grad=True)
    h = torch.randn(1, 4, 7, dtype=torch.float64)
    gru_step(ours, x, h)[0].sum().backward()
    x_ref = x.detach().clone().requires_grad_()
    ref(x_ref.unsqueeze(0), h)[0].sum().backward()
    torch.testing.assert_close(x.grad, x_ref.grad)
    torch.testing.assert_close(ours.weight_hh_l0.grad, ref.weight_hh_l0.grad)


def test_the_model_recurs_alike_either_way() -> None:
    torch.manual_seed(2)
    model = NextClickGRU(GRUConfig(n_items=9, embedding_size=4, hidden_size=3, layers=2, ff_sizes=[5]))
    embedded, hidden = torch.randn(6, 4), torch.randn(2, 6, 3)
    f_ref, h_ref = model.recur(embedded, hidden)
    f_ours, h_ours = model.recur(embedded, hidden, hand_backward=True)
    torch.testing.assert_close(f_ours, f_ref)
    torch.testing.assert_close(h_ours, h_ref)


def test_an_unsupported_gru_is_refused() -> None:
    with pytest.raises(ValueError, match="unidirectional"):
        gru_step(torch.nn.GRU(3, 4, bidirectional=True), torch.randn(2, 3), torch.zeros(2, 2, 4))
