"""Convolution, pooling and normalisation onto the catalog's ops."""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def _ints(values: Sequence[int], rank: int) -> list[int]:
    values = [int(v) for v in values]
    return values * rank if len(values) == 1 else values


@handles(aten.convolution.default)
def convolution(r: "Recorder", c: Call) -> list[str | None]:
    x, weight, bias, out = c["input"], c["weight"], c["bias"], c.outs[0]
    spatial = x.dim() - 2
    if c["transposed"] or spatial not in (1, 2):
        raise Unmapped("a transposed or 3-d convolution")
    op = "conv1d" if spatial == 1 else "conv2d"
    inputs: list[torch.Tensor] = [x, weight] + ([bias] if bias is not None else [])
    return [
        r.op(
            op,
            inputs,
            out,
            stride=_ints(c["stride"], spatial),
            padding=_ints(c["padding"], spatial),
            dilation=_ints(c["dilation"], spatial),
            groups=int(c["groups"]),
        )
    ]


@handles(aten.max_pool2d_with_indices.default)
def max_pool2d(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if c["ceil_mode"] or x.dim() != 4:
        raise Unmapped("ceil_mode, or an unbatched input")
    kernel = _ints(c["kernel_size"], 2)
    stride = _ints(c["stride"], 2) if c["stride"] else kernel
    return [
        r.op("max_pool2d", [x], out, kernel=kernel, stride=stride, padding=_ints(c["padding"], 2), dilation=_ints(c["dilation"], 2)),
        None,  # the indices
    ]


@handles(aten.avg_pool2d.default)
def avg_pool2d(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if c["ceil_mode"] or c["divisor_override"] is not None or x.dim() != 4:
        raise Unmapped("ceil_mode, a divisor override or an unbatched input")
    kernel = _ints(c["kernel_size"], 2)
    stride = _ints(c["stride"], 2) if c["stride"] else kernel
    return [
        r.op(
            "avg_pool2d",
            [x],
            out,
            kernel=kernel,
            stride=stride,
            padding=_ints(c["padding"], 2),
            count_include_pad=bool(c["count_include_pad"]),
        )
    ]


def _statistics(r: "Recorder", x: torch.Tensor, axes: list[int], eps: float, mean_out: torch.Tensor, rstd_out: torch.Tensor) -> tuple:
    """The mean and 1/√(var + eps) over `axes` that a normalisation returns
    beside its output, made as nodes only if a later op reads them."""

    source = r.node(x)

    def mean() -> str:
        return r.reduce_to("mean", x, axes, mean_out, source=source)

    def rstd() -> str:
        variance = r.compute(lambda: x.var(dim=axes, correction=0, keepdim=True))
        var_node = r.reduce_to("var", x, axes, variance, source=source, correction=0)
        shifted = r.compute(lambda: variance + eps)
        total = r.op("add", [var_node, eps], shifted)
        node = r.op("rsqrt", [total], r.compute(lambda: torch.rsqrt(shifted)))
        if r.shape_of(node) != tuple(rstd_out.shape):
            node = r.op("reshape", [node], rstd_out, shape=list(rstd_out.shape))
        return node

    return r.later(mean_out, mean), r.later(rstd_out, rstd)


@handles(aten.native_layer_norm.default)
def layer_norm(r: "Recorder", c: Call) -> list[str | None]:
    x, out, mean_out, rstd_out = c["input"], c.outs[0], c.outs[1], c.outs[2]
    k = len(c["normalized_shape"])
    inputs: list[torch.Tensor | str | None] = [x, c["weight"], c["bias"]]
    if c["bias"] is None:
        inputs.pop()
        if c["weight"] is None:
            inputs.pop()
    elif c["weight"] is None:
        raise Unmapped("a bias without a weight")
    eps = float(c["eps"])
    node = r.op("layer_norm", inputs, out, axis=-k, eps=eps)  # type: ignore[arg-type]
    axes = list(range(x.dim() - k, x.dim()))
    return [node, *_statistics(r, x, axes, eps, mean_out, rstd_out)]


@handles(aten.native_batch_norm.default)
def batch_norm(r: "Recorder", c: Call) -> list[str | None]:
    x, weight, bias, out = c["input"], c["weight"], c["bias"], c.outs[0]
    eps = float(c["eps"])
    if not c["training"]:
        return [_frozen_batch_norm(r, x, weight, bias, c["running_mean"], c["running_var"], eps, out), None, None]
    if weight is None and bias is not None:
        raise Unmapped("a bias without a weight")
    inputs = [x] + ([weight] if weight is not None else []) + ([bias] if bias is not None else [])
    node = r.op("batch_norm", inputs, out, eps=eps)
    axes = [0] + list(range(2, x.dim()))
    mean_out, rstd_out = c.outs[1], c.outs[2]
    return [node, *_statistics(r, x, axes, eps, mean_out, rstd_out)]


def _frozen_batch_norm(r: "Recorder", x, weight, bias, mean, var, eps: float, out: torch.Tensor) -> str:  # type: ignore[no-untyped-def]
    """Evaluation mode: (x − running mean) / √(running var + eps) · weight + bias,
    the statistics constants."""
    shape = [1, x.shape[1]] + [1] * (x.dim() - 2)
    centred_value = r.compute(lambda: x - mean.reshape(shape))
    node = r.op("sub", [x, r.const(mean.reshape(shape).to(x.dtype), "running_mean")], centred_value)
    scale = torch.rsqrt(var.to(torch.float64) + eps).to(x.dtype).reshape(shape)
    value = r.compute(lambda: centred_value * scale)
    last = weight is None and bias is None
    node = r.op("mul", [node, r.const(scale, "running_scale")], out if last else value)
    if weight is not None:
        scaled = out if bias is None else r.compute(lambda: value * weight.reshape(shape))
        w = r.op("reshape", [weight], r.compute(lambda: weight.reshape(shape)), shape=shape)
        node = r.op("mul", [node, w], scaled)
        value = scaled
    if bias is not None:
        b = r.op("reshape", [bias], r.compute(lambda: bias.reshape(shape)), shape=shape)
        node = r.op("add", [node, b], out)
    return node


@handles(aten.native_group_norm.default)
def group_norm(r: "Recorder", c: Call) -> list[str | None]:
    x, weight, bias, out = c["input"], c["weight"], c["bias"], c.outs[0]
    if weight is None and bias is not None:
        raise Unmapped("a bias without a weight")
    inputs = [x] + ([weight] if weight is not None else []) + ([bias] if bias is not None else [])
    groups, eps = int(c["group"]), float(c["eps"])
    node = r.op("group_norm", inputs, out, groups=groups, eps=eps)

    def unavailable() -> str:
        raise r.error("a later op reads group norm's mean or deviation", "compute them from the input instead")

    return [node, r.later(c.outs[1], unavailable), r.later(c.outs[2], unavailable)]


@handles(aten._fused_rms_norm.default)
def rms_norm(r: "Recorder", c: Call) -> list[str | None]:
    x, weight, out = c["input"], c["weight"], c.outs[0]
    k = len(c["normalized_shape"])
    eps = c["eps"]
    if eps is None:
        eps = torch.finfo(x.dtype).eps
    inputs = [x] + ([weight] if weight is not None else [])
    node = r.op("rms_norm", inputs, out, axis=-k, eps=float(eps))

    def unavailable() -> str:
        raise r.error("a later op reads rms norm's reciprocal deviation", "compute it from the input instead")

    return [node, r.later(c.outs[1], unavailable)]
