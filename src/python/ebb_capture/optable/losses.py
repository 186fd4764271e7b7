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


_REDUCTION = {0: "none", 1: "mean", 2: "sum"}


@handles(aten.nll_loss_forward.default)
def nll_loss(r: "Recorder", c: Call) -> list[str | None]:
    """The catalog's nll_loss; with class weights, −Σᵢ wᵢ · logp[i, yᵢ] / W
    as a multiply by a constant matrix M with M[i, yᵢ] = w[yᵢ] / W (W = Σᵢ
    w[yᵢ] for the mean, 1 for the sum; ignored rows are zero), a sum over
    the classes and a negation."""
    logp, target, weight, out = c["self"], c["target"], c["weight"], c.outs[0]
    reduction, ignore = c["reduction"], c["ignore_index"]
    if logp.dim() not in (1, 2):
        raise Unmapped("nll_loss over spatial axes")
    if weight is None:
        node = r.op("nll_loss", [logp, target], out, reduction=_REDUCTION[reduction], ignore_index=int(ignore))
        return [node, None]
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
    """Rows of the table by index; a repeated index accumulates."""
    if c["scale_grad_by_freq"]:
        raise Unmapped("scale_grad_by_freq")
    attrs = {"padding_idx": int(c["padding_idx"])} if c["padding_idx"] != -1 else {}
    return [r.op("embedding", [c["weight"], c["indices"]], c.outs[0], **attrs)]


def _same_shapes(c: Call) -> None:
    if tuple(c["self"].shape) != tuple(c["target"].shape):
        raise Unmapped("prediction and target of different shapes")


@handles(aten.binary_cross_entropy_with_logits.default)
def bce_with_logits(r: "Recorder", c: Call) -> list[str | None]:
    if c["weight"] is not None or c["pos_weight"] is not None:
        raise Unmapped("weighted binary cross-entropy")
    _same_shapes(c)
    return [r.op("bce_with_logits", [c["self"], c["target"]], c.outs[0], reduction=_REDUCTION[c["reduction"]])]


@handles(aten.huber_loss.default)
def huber(r: "Recorder", c: Call) -> list[str | None]:
    _same_shapes(c)
    return [r.op("huber", [c["self"], c["target"]], c.outs[0], delta=float(c["delta"]), reduction=_REDUCTION[c["reduction"]])]


@handles(aten.smooth_l1_loss.default)
def smooth_l1(r: "Recorder", c: Call) -> list[str | None]:
    """Smooth L1 with β = 1 is Huber with δ = 1; with β = 0 it is L1."""
    _same_shapes(c)
    reduction = _REDUCTION[c["reduction"]]
    if c["beta"] == 1:
        return [r.op("huber", [c["self"], c["target"]], c.outs[0], delta=1.0, reduction=reduction)]
    if c["beta"] == 0:
        return [r.op("l1_loss", [c["self"], c["target"]], c.outs[0], reduction=reduction)]
    raise Unmapped("smooth L1 with β other than 0 or 1")


@handles(aten.l1_loss.default)
def l1_loss(r: "Recorder", c: Call) -> list[str | None]:
    _same_shapes(c)
    return [r.op("l1_loss", [c["self"], c["target"]], c.outs[0], reduction=_REDUCTION[c["reduction"]])]
