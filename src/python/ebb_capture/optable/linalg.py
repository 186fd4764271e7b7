"""Matrix products onto Ebb's matmul; fused ATen ops split into their parts
(addmm is a matmul, then an add of the bias)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from . import Call, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


@handles(aten.mm.default, aten.bmm.default)
def matmul(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("matmul", [c["self"], c["mat2"]], c.outs[0])]


def _plus_bias(r: "Recorder", c: Call, product: str, product_value: torch.Tensor) -> str:
    """beta · bias + alpha · product, as separate nodes where beta or alpha is not 1."""
    out = c.outs[0]
    alpha, beta = c["alpha"], c["beta"]
    if alpha != 1:
        product_value = r.compute(lambda: product_value * alpha)
        product = r.op("mul", [product, alpha], product_value)
    if beta == 0:
        return r.alias_value(product, out)
    bias: torch.Tensor | str = c["self"]
    if beta != 1:
        bias_value = r.compute(lambda: c["self"] * beta)
        bias = r.op("mul", [c["self"], beta], bias_value)
    total = r.op("add", [bias, product], out)
    if product_value.shape == out.shape:
        r.report_as(product, total)
    return total


def _product(r: "Recorder", a: torch.Tensor, b: torch.Tensor, multiply) -> tuple[str, torch.Tensor]:  # type: ignore[no-untyped-def]
    """The product inside a fused multiply-add. In f16 and bf16 the kernel
    keeps it in its f32 accumulator and rounds only the sum with the bias:
    so the product node is f32 (Ebb accumulates a matmul in f32 and rounds
    into the node's dtype), and the add rounds once into the half format."""
    if a.dtype in (torch.float16, torch.bfloat16):
        value = r.compute(lambda: multiply(a.float(), b.float()))
    else:
        value = r.compute(lambda: multiply(a, b))
    return r.op("matmul", [a, b], value), value


@handles(aten.addmm.default)
def addmm(r: "Recorder", c: Call) -> list[str | None]:
    product, value = _product(r, c["mat1"], c["mat2"], torch.mm)
    return [_plus_bias(r, c, product, value)]


@handles(aten.baddbmm.default)
def baddbmm(r: "Recorder", c: Call) -> list[str | None]:
    product, value = _product(r, c["batch1"], c["batch2"], torch.bmm)
    return [_plus_bias(r, c, product, value)]
