"""Partials of custom ops, computed with autograd once the step is over:
a diagonal for elementwise ops, else the dense Jacobian from
``torch.autograd.functional.jacobian``."""

from __future__ import annotations

from typing import Any

import torch
from torch.utils._pytree import tree_flatten, tree_unflatten

from .errors import CaptureError
from .recorder import Deferred


def _runner(item: Deferred) -> tuple[list[Any], Any, list[int]]:
    flat, spec = tree_flatten((item.args, item.kwargs))
    return flat, spec, [i for i, _ in item.live]


def _call(item: Deferred, flat: list[Any], spec: Any) -> list[torch.Tensor]:
    args, kwargs = tree_unflatten(flat, spec)
    out = item.func(*args, **kwargs)
    outs = [o for o in tree_flatten(out)[0] if isinstance(o, torch.Tensor)]
    return [outs[k] for k, _ in item.outputs]


def fill_partials(item: Deferred) -> None:
    """Computes and stores the partials of every output node of `item`."""
    flat, spec, positions = _runner(item)
    inputs = [flat[i] for i in positions]
    try:
        if item.pointwise:
            _diagonal(item, flat, spec, positions, inputs)
        else:
            _dense(item, flat, spec, positions, inputs)
    except CaptureError:
        raise
    except Exception as exc:  # autograd could not differentiate it
        where = f" at {item.site}" if item.site else ""
        raise CaptureError(
            f"ebb_capture: {item.func} has no Ebb op or decomposition, and autograd could not form its Jacobian{where} "
            f"({type(exc).__name__}: {exc}); express it with other ops or record a block without it"
        ) from exc


def _diagonal(item: Deferred, flat: list[Any], spec: Any, positions: list[int], inputs: list[torch.Tensor]) -> None:
    (_, node), = item.outputs
    shape = node.shape
    partials = []
    for j, position in enumerate(positions):
        with torch.enable_grad():
            trial = list(flat)
            for k, p in enumerate(positions):
                trial[p] = inputs[k]
            # The input broadcast to the output's shape, so each output
            # element has its own entry of the partial.
            spread = inputs[j].detach().expand(shape).clone().requires_grad_(True)
            trial[position] = spread
            (out,) = _call(item, trial, spec)
            (grad,) = torch.autograd.grad(out.sum(), spread, allow_unused=True)
        if grad is None:
            grad = torch.zeros(shape, dtype=spread.dtype)
        partials.append({"diag": grad.detach().reshape(-1)})
    node.partials = partials


def _dense(item: Deferred, flat: list[Any], spec: Any, positions: list[int], inputs: list[torch.Tensor]) -> None:
    def f(*xs: torch.Tensor) -> tuple[torch.Tensor, ...]:
        trial = list(flat)
        for p, x in zip(positions, xs):
            trial[p] = x
        return tuple(_call(item, trial, spec))

    leaves = tuple(x.detach() for x in inputs)
    try:
        jac = torch.autograd.functional.jacobian(f, leaves, vectorize=True)
    except Exception:
        jac = torch.autograd.functional.jacobian(f, leaves)
    for k, (_, node) in enumerate(item.outputs):
        rows = node.numel
        node.partials = [{"jacobian": jac[k][j].detach().reshape(rows, max(x.numel(), 1))} for j, x in enumerate(leaves)]
