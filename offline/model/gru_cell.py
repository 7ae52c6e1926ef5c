"""One step of `nn.GRU` for training, with its backward written out.

The trainer runs the GRU one click at a time ([B, E] in, [B, H] out). At B = 256, hidden 100,
on two threads, `nn.GRU`'s forward and autograd backward take about 1.3 ms of a step, most of it
five small matrix products that stay; the closed-form gradient below skips the rest of autograd's
work (and the gradient of the detached hidden state): 0.15-0.3 ms less a step, measured inside
train_epoch. The weights stay in the `nn.GRU` (its names, its checkpoint keys, what the export
reads); only the training step goes through here.

The equations are those of the `torch.nn.GRU` documentation (r, z, n stacked in that order in
weight_ih_l{k} / weight_hh_l{k}):
    r = sigmoid(x W_ir' + b_ir + h W_hr' + b_hr)
    z = sigmoid(x W_iz' + b_iz + h W_hz' + b_hz)
    n = tanh(x W_in' + b_in + r * (h W_hn' + b_hn))
    h' = n + z * (h - n)                                   (= (1 - z) n + z h)
and with g = dL/dh':
    dz = g (h - n) z (1 - z)       dn = g (1 - z) (1 - n^2)       dr = dn (h W_hn' + b_hn) r (1 - r)
    dgi = [dr | dz | dn]  (the input-side pre-activations)       dgh = [dr | dz | dn r]
    dx = dgi W_ih    dh = dgh W_hh + g z    dW_ih = dgi' x    dW_hh = dgh' h    db = column sums
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn


class _GRUCell(torch.autograd.Function):
    @staticmethod
    def forward(ctx: Any, x: torch.Tensor, h: torch.Tensor, w_ih: torch.Tensor, w_hh: torch.Tensor,
                b_ih: torch.Tensor, b_hh: torch.Tensor) -> torch.Tensor:
        n_h = h.shape[1]
        gi = torch.addmm(b_ih, x, w_ih.t())  # [B, 3H]
        gh = torch.addmm(b_hh, h, w_hh.t())  # [B, 3H]
        rz = gi[:, : 2 * n_h].add_(gh[:, : 2 * n_h]).sigmoid_()  # [B, 2H], r then z (gi's storage reused)
        r, z = rz[:, :n_h], rz[:, n_h:]
        h_n = gh[:, 2 * n_h:]  # [B, H], h W_hn' + b_hn
        n = torch.addcmul(gi[:, 2 * n_h:], r, h_n).tanh_()  # [B, H]
        out = torch.sub(h, n).mul_(z).add_(n)  # [B, H]
        ctx.save_for_backward(x, h, w_ih, w_hh, rz, h_n, n)
        return out

    @staticmethod
    def backward(ctx: Any, g: torch.Tensor) -> tuple[torch.Tensor | None, ...]:
        x, h, w_ih, w_hh, rz, h_n, n = ctx.saved_tensors
        n_h = h.shape[1]
        r, z = rz[:, :n_h], rz[:, n_h:]
        zc = torch.rsub(z, 1.0)  # 1 - z
        d_n = torch.mul(n, n).neg_().add_(1.0).mul_(g).mul_(zc)  # [B, H], g (1 - z) (1 - n^2)
        d_z = torch.sub(h, n).mul_(g).mul_(z).mul_(zc)  # [B, H], g (h - n) z (1 - z)
        d_r = torch.mul(d_n, h_n).mul_(r).mul_(torch.rsub(r, 1.0))  # [B, H], dn h_n r (1 - r)
        dgi = torch.cat([d_r, d_z, d_n], 1)  # [B, 3H]
        dgh = torch.cat([d_r, d_z, d_n.mul_(r)], 1)  # [B, 3H]
        dx = dgi @ w_ih if ctx.needs_input_grad[0] else None
        dh = torch.addcmul(dgh @ w_hh, g, z) if ctx.needs_input_grad[1] else None
        dw_ih = dgi.t() @ x if ctx.needs_input_grad[2] else None
        dw_hh = dgh.t() @ h if ctx.needs_input_grad[3] else None
        db_ih = dgi.sum(0) if ctx.needs_input_grad[4] else None
        db_hh = dgh.sum(0) if ctx.needs_input_grad[5] else None
        return dx, dh, dw_ih, dw_hh, db_ih, db_hh


def gru_step(gru: nn.GRU, x: torch.Tensor, hidden: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """`gru(x.unsqueeze(0), hidden)` for one step: x [B, E], hidden [L, B, H] -> (output [B, H], new hidden [L, B, H])."""
    if gru.batch_first or gru.bidirectional or not gru.bias or gru.dropout or gru.proj_size:
        raise ValueError("gru_step covers a unidirectional nn.GRU with biases and no inter-layer dropout")
    layers = []
    for k in range(gru.num_layers):
        x = _GRUCell.apply(x, hidden[k], getattr(gru, f"weight_ih_l{k}"), getattr(gru, f"weight_hh_l{k}"),
                           getattr(gru, f"bias_ih_l{k}"), getattr(gru, f"bias_hh_l{k}"))
        layers.append(x)
    return x, torch.stack(layers)
