"""Autocast steps beyond the bf16 model of test_models.py: a half format's
rounding is the finest agreement there can be, and a wrong backward is
still found.

Where a step computes in f16 or bf16, PyTorch's f32 kernels and Ebb's op
table (f64, rounded once) agree to the last f32 bits only, so an entry
near a half-precision rounding boundary can round either way: one unit
roundoff u of the format (2⁻¹¹ for f16, 2⁻⁸ for bf16; IEEE 754-2019 table
3.5, and Intel, "BFLOAT16 – Hardware Numerics Definition", 2018) relative
to the entry. Gradients must agree within 4u, and `ebb verify` judges
reported gradients at that precision in such a trace.
"""

from __future__ import annotations

import json

import pytest
import torch
from torch import nn

from conftest import relative_error

HALF_TOLERANCE = {torch.float16: 4 * 2.0**-11, torch.bfloat16: 4 * 2.0**-8}


class Sprinkler(nn.Module):
    """Litres per zone of a garden from six soil readings: a tanh layer, then
    a layer norm and softmax over eight zones."""

    def __init__(self) -> None:
        super().__init__()
        self.sense = nn.Linear(6, 12)
        self.zones = nn.Linear(12, 8)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = torch.tanh(self.sense(x))
        return torch.softmax(nn.functional.layer_norm(self.zones(h), (8,)), dim=-1)


@pytest.mark.parametrize("half", [torch.float16, torch.bfloat16], ids=["f16", "bf16"])
def test_autocast_tanh_layer_norm_softmax(ebb, capture, half):
    torch.manual_seed(23)
    model = Sprinkler()
    soil = torch.randn(5, 6)
    share = torch.softmax(torch.randn(5, 8), dim=-1)

    def step(m):
        with torch.autocast("cpu", dtype=half):
            out = m(soil)
        return nn.functional.mse_loss(out.float(), share) * 1024  # a scaled loss

    trace, theirs = capture(model, step, "sprinkler")
    header = json.loads(trace.read_text())
    assert {"f16" if half == torch.float16 else "bf16", "f32"} <= {n.get("dtype", header["dtype"]) for n in header["nodes"]}
    assert {n["id"]: n for n in header["nodes"]}[header["output"]]["op"] == "mul"  # the loss scale
    ours = ebb.gradients(trace)
    for name, grad in theirs.items():
        assert relative_error(ours[name], grad) <= HALF_TOLERANCE[half], name
    status, result = ebb.verify(trace)
    assert status == 0, json.dumps(result["suspects"], indent=1)
    assert all(entry["tolerance"] == max(1e-4, HALF_TOLERANCE[half]) for entry in result["reported"])


class Flipped(torch.autograd.Function):
    """x³ with its backward's sign flipped."""

    @staticmethod
    def forward(ctx, x):
        ctx.save_for_backward(x)
        return x * x * x

    @staticmethod
    def backward(ctx, grad):
        (x,) = ctx.saved_tensors
        return -3 * grad * x * x


def test_a_wrong_backward_is_found_under_bf16_autocast(ebb, capture):
    torch.manual_seed(24)
    model = nn.Sequential(nn.Linear(4, 6), nn.Linear(6, 1))
    x, y = torch.randn(7, 4), torch.randn(7, 1)

    def step(m):
        with torch.autocast("cpu", dtype=torch.bfloat16):
            out = m[1](Flipped.apply(m[0](x)))
        return nn.functional.mse_loss(out.float(), y)

    trace, _ = capture(model, step, "flipped")
    status, result = ebb.verify(trace)
    assert status == 1
    suspects = {s["node"] for s in result["suspects"]}
    nodes = {n["id"]: n for n in json.loads(trace.read_text())["nodes"]}
    assert suspects and all(nodes[s].get("group", "").endswith("Flipped") for s in suspects), suspects
