"""Losses and dropout."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten

_MEAN = 1  # ATen's reduction codes: 0 none, 1 mean, 2 sum
_SUM = 2


@handles(aten.mse_loss.default)
def mse_loss(r: "Recorder", c: Call) -> list[str | None]:
    x, target, out = c["self"], c["target"], c.outs[0]
    if c["reduction"] != _MEAN or x.shape != target.shape:
        raise Unmapped("mse_loss without mean reduction over equal shapes")
    return [r.op("mse", [x, target], out)]


@handles(aten.nll_loss_forward.default)
def nll_loss(r: "Recorder", c: Call) -> list[str | None]:
    """−Σᵢ wᵢ · logp[i, yᵢ] / W as a multiply by a constant matrix M with
    M[i, yᵢ] = w[yᵢ] / W (W = Σᵢ w[yᵢ] for the mean, 1 for the sum; ignored
    rows are zero), a sum over the classes and a negation."""
    logp, target, weight, out = c["self"], c["target"], c["weight"], c.outs[0]
    reduction, ignore = c["reduction"], c["ignore_index"]
    if logp.dim() not in (1, 2):
        raise Unmapped("nll_loss over spatial axes")
    logp2 = logp if logp.dim() == 2 else logp.unsqueeze(0)
    target1 = target.reshape(-1).to(torch.int64)
    n, classes = logp2.shape
    keep = target1 != ignore
    safe = torch.where(keep, target1, torch.zeros_like(target1))
    w = weight.to(logp.dtype)[safe] if weight is not None else torch.ones(n, dtype=logp.dtype)
    w = torch.where(keep, w, torch.zeros_like(w))
    coeff = w.to(torch.float64)
    if reduction == _MEAN:
        coeff = coeff / coeff.sum()
    matrix = torch.zeros(n, classes, dtype=torch.float64)
    matrix[torch.arange(n), safe] = coeff
    matrix = matrix.to(logp.dtype).reshape(logp.shape)
    picked = r.compute(lambda: logp * matrix)
    node = r.op("mul", [logp, r.const(matrix, "nll_weights")], picked)
    if reduction == 0 and logp.dim() == 2:
        summed = r.compute(lambda: picked.sum(1))
        node = r.op("sum", [node], summed, axis=1, keepdims=False)
        return [r.op("neg", [node], out), None]
    total = r.compute(lambda: picked.sum())
    node = r.op("sum", [node], total)
    return [r.op("neg", [node], out), None]


@handles(aten.native_dropout.default)
def native_dropout(r: "Recorder", c: Call) -> list[str | None]:
    """Dropout is a multiply by the mask as it was drawn, scaled by 1/(1 − p)."""
    x, out, mask = c["input"], c.outs[0], c.outs[1]
    p, train = c["p"], c["train"]
    if not train:
        return [r.same(x, out), None]
    scale = 0.0 if p >= 1 else 1.0 / (1.0 - p)
    factor = (mask.to(torch.float64) * scale).to(x.dtype)
    return [r.op("mul", [x, r.const(factor, "dropout_mask")], out), None]


@handles(aten.embedding.default)
def embedding(r: "Recorder", c: Call) -> list[str | None]:
    """Rows of the table: a matmul of a constant one-hot matrix of the
    indices with the table (exact: each output element is one product with
    1 plus zeros). The gradient of a repeated index accumulates."""
    table, indices, out = c["weight"], c["indices"], c.outs[0]
    rows = table.shape[0]
    flat = indices.reshape(-1).to(torch.int64)
    one_hot = torch.zeros(flat.numel(), rows, dtype=table.dtype)
    one_hot[torch.arange(flat.numel()), flat] = 1
    one_hot = one_hot.reshape(*indices.shape, rows)
    return [r.op("matmul", [r.const(one_hot, "one_hot"), table], out)]
