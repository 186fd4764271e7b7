"""Eight small models, each recorded, then run through `ebb check --json`,
`ebb verify` and `ebb gradients`: every parameter's gradient as Ebb's sweep
computes it must agree with PyTorch's own autograd (the outside reference)
to a relative error of the norm of the difference of 1e-5 in f32 runs and
1e-12 in f64 runs. The f32 models run in f64 too.

The scenarios are our own invention; the data are seeded random numbers.
"""

from __future__ import annotations

import inspect
import json
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

from conftest import TOLERANCE, relative_error

DTYPES = [pytest.param(torch.float32, id="f32"), pytest.param(torch.float64, id="f64")]


def agree(ebb, trace: Path, theirs: dict[str, np.ndarray], dtype: torch.dtype, skip: set[str] = frozenset()) -> dict[str, float]:
    """Asserts that every parameter's gradient as Ebb's sweep computes it
    (read in full with `ebb gradients -o FILE.safetensors`) agrees with
    PyTorch's `p.grad`: ‖ours − theirs‖ / ‖theirs‖ within the run's
    tolerance, element by element in shape and value. Returns the errors."""
    ours = ebb.gradients(trace)
    missing = set(theirs) - set(ours) - set(skip)
    assert not missing, f"ebb gradients has no gradient for {missing}"
    compared = {}
    for name in theirs:
        if name in skip:
            continue
        assert ours[name].shape == theirs[name].shape, name
        compared[name] = relative_error(ours[name], theirs[name])
    worst = max(compared, key=compared.get)
    assert compared[worst] <= TOLERANCE[dtype], f"{worst}: relative error {compared[worst]:.3e} > {TOLERANCE[dtype]:.0e} ({compared})"
    return compared


def clean_check(ebb, trace: Path) -> dict:
    """`ebb check` read and swept the whole trace, nothing was non-finite,
    and every node's recorded value is what its op gives from its recorded
    inputs (Ebb's forward-consistency rule)."""
    status, report = ebb.check(trace)
    assert status in (0, 1)
    assert report["counts"]["swept"] == report["counts"]["nodes"]
    assert not [f for f in report["flags"] if f["kind"].startswith("non_finite")]
    mismatches = [f for f in report["diagnosis"]["findings"] if f["rule"] == "forward_mismatch" and not _kernel_error(f)]
    assert not mismatches, json.dumps(mismatches, indent=1)
    return report


def _kernel_error(finding: dict) -> bool:
    """PyTorch's f32 GELU kernel computes 0.5·x·(1 + erf(x/√2)), which cancels
    for x below about −3: its value there is off by up to a few times 1e-7
    (tens of units in the last place of the small result), beyond the
    tolerance Ebb's forward-consistency rule allows a faithful library. The
    trace records that value as PyTorch computed it; only this is excused."""
    return finding["op"] == "gelu" and finding["value"] < 1e-6


def clean_verify(ebb, trace: Path) -> dict:
    status, result = ebb.verify(trace)
    assert status == 0, json.dumps(result["suspects"], indent=1)
    assert result["suspects"] == []
    return result


# 1. A bakery's daily bread demand from weather and calendar features.
@pytest.mark.parametrize("dtype", DTYPES)
def test_mlp_regression(ebb, capture, dtype):
    torch.manual_seed(11)
    model = nn.Sequential(nn.Linear(5, 16), nn.Tanh(), nn.Linear(16, 16), nn.Tanh(), nn.Linear(16, 1)).to(dtype)
    features = torch.randn(12, 5, dtype=dtype)
    loaves = torch.randn(12, 1, dtype=dtype)
    trace, theirs = capture(model, lambda m: nn.functional.mse_loss(m(features), loaves), "bakery")
    report = clean_check(ebb, trace)
    assert {g["id"] for g in report["gradients"]} == set(theirs)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, dtype)


# 2. Weave types from 8×8 loom tiles: conv, batch norm, max pool, dropout.
@pytest.mark.parametrize("dtype", DTYPES)
def test_cnn(ebb, capture, dtype):
    torch.manual_seed(12)
    model = nn.Sequential(
        nn.Conv2d(1, 4, 3, padding=1, bias=False),  # the batch norm's shift makes a bias redundant
        nn.BatchNorm2d(4),
        nn.ReLU(),
        nn.MaxPool2d(2),
        nn.Dropout(0.25),
        nn.Flatten(),
        nn.Linear(4 * 4 * 4, 3),
    ).to(dtype)
    tiles = torch.randn(3, 1, 8, 8, dtype=dtype)
    weave = torch.tensor([0, 2, 1])
    trace, theirs = capture(model, lambda m: nn.functional.cross_entropy(m(tiles), weave), "loom")
    clean_check(ebb, trace)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, dtype)


# 3. Next readings of a beehive's sensors from the last five: one encoder layer.
@pytest.mark.parametrize("dtype", DTYPES)
def test_transformer_encoder_layer(ebb, capture, dtype):
    torch.manual_seed(13)
    model = nn.TransformerEncoderLayer(16, 2, 32, dropout=0.1, batch_first=True).to(dtype)
    readings = torch.randn(2, 5, 16, dtype=dtype)
    following = torch.randn(2, 5, 16, dtype=dtype)
    trace, theirs = capture(model, lambda m: nn.functional.mse_loss(m(readings), following), "beehive")
    clean_check(ebb, trace)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, dtype)


# 3b. The same beehive layer reading causally: each hour attends to itself and
# the hours before it, through the additive mask PyTorch builds (−inf above
# the diagonal). Softmax absorbs the −inf, so the check notes the mask instead
# of flagging it, and verify judges every derivative around it.
@pytest.mark.parametrize("dtype", [pytest.param(torch.float32, id="f32")])
def test_transformer_encoder_layer_with_a_causal_mask(ebb, capture, dtype):
    torch.manual_seed(14)
    model = nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True).to(dtype)
    readings = torch.randn(2, 5, 16, dtype=dtype)
    following = torch.randn(2, 5, 16, dtype=dtype)
    mask = nn.Transformer.generate_square_subsequent_mask(5, dtype=dtype)
    assert torch.isneginf(mask).sum() == 10  # 5·4/2 places above the diagonal
    step = lambda m: nn.functional.mse_loss(m(readings, src_mask=mask, is_causal=True), following)  # noqa: E731
    trace, theirs = capture(model, step, "causal beehive")
    report = clean_check(ebb, trace)
    assert not [f for f in report["diagnosis"]["findings"] if f["rule"] == "non_finite"]
    assert report["masked"], "the mask is noted"
    assert all(entry["absorbed_by"] for entry in report["masked"])
    result = clean_verify(ebb, trace)
    assert result["verdict"] == "agrees"
    assert result["masked"]
    agree(ebb, trace, theirs, dtype)


class TideModel(nn.Module):
    """Tide height in the next hour from 20 hours of gauge readings."""

    def __init__(self, cell: type[nn.Module]) -> None:
        super().__init__()
        self.rnn = cell(4, 6, batch_first=True)
        self.head = nn.Linear(6, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out, _ = self.rnn(x)
        return self.head(out[:, -1])


# 4. The same tide model with a GRU and with an LSTM, unrolled over 20 steps.
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("cell", [nn.GRU, nn.LSTM], ids=["gru", "lstm"])
def test_recurrent(ebb, capture, cell, dtype):
    torch.manual_seed(14)
    model = TideModel(cell).to(dtype)
    gauge = torch.randn(3, 20, 4, dtype=dtype)
    height = torch.randn(3, 1, dtype=dtype)
    trace, theirs = capture(model, lambda m: nn.functional.mse_loss(m(gauge), height), "tide")
    clean_check(ebb, trace)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, dtype)


# 5. A recipe's rating from its ingredient tokens: embedding, layer norm, GELU.
@pytest.mark.parametrize("dtype", DTYPES)
def test_embedding_layer_norm_gelu(ebb, capture, dtype):
    torch.manual_seed(15)
    model = nn.Sequential(nn.Embedding(10, 8), nn.LayerNorm(8), nn.GELU(), nn.Linear(8, 1)).to(dtype)
    tokens = torch.tensor([[1, 2, 3, 2], [4, 5, 1, 9]])
    rating = torch.randn(2, 4, 1, dtype=dtype)
    trace, theirs = capture(model, lambda m: nn.functional.mse_loss(m(tokens), rating), "recipes")
    clean_check(ebb, trace)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, dtype)


class SoftClip(torch.autograd.Function):
    """A hand-written soft clip, tanh, whose backward has its sign flipped."""

    @staticmethod
    def forward(ctx, x):
        y = torch.tanh(x)
        ctx.save_for_backward(y)
        return y

    @staticmethod
    def backward(ctx, grad):
        (y,) = ctx.saved_tensors
        return -grad * (1 - y * y)  # the sign error


class RightClip(SoftClip):
    @staticmethod
    def backward(ctx, grad):
        (y,) = ctx.saved_tensors
        return grad * (1 - y * y)


class Thermostat(nn.Module):
    """Heating power from room readings, through the custom soft clip."""

    def __init__(self, clip: type[torch.autograd.Function]) -> None:
        super().__init__()
        self.sense = nn.Linear(3, 6)
        self.drive = nn.Linear(6, 1)
        self.clip = clip

    def forward(self, x):
        return self.drive(self.clip.apply(self.sense(x)))


# 6. A custom Function with a wrong backward: verify names its node, and no other.
@pytest.mark.parametrize("dtype", DTYPES)
def test_custom_function_with_wrong_backward(ebb, capture, dtype):
    torch.manual_seed(16)
    model = Thermostat(SoftClip).to(dtype)
    rooms = torch.randn(5, 3, dtype=dtype)
    power = torch.randn(5, 1, dtype=dtype)
    trace, theirs = capture(model, lambda m: nn.functional.mse_loss(m(rooms), power), "thermostat")
    clean_check(ebb, trace)
    status, result = ebb.verify(trace)
    assert status == 1
    suspects = [s["node"] for s in result["suspects"]]
    assert suspects == ["SoftClip/tanh"], json.dumps(result["suspects"], indent=1)
    # Ebb derives the true derivative of what the forward ran: the drive's
    # gradients agree with PyTorch's; the sense layer's do not, and central
    # differences of the recorded forward side with Ebb.
    agree(ebb, trace, theirs, dtype, skip={"sense.weight", "sense.bias"})
    errors = ebb.agreement(trace)
    assert errors["sense.weight"] > 0.5 and errors["sense.bias"] > 0.5
    for check in result["finite_differences"]:
        assert check["band"] in ("good", "acceptable", "unresolved"), check
    # The same model with a correct backward: PyTorch's sense gradients
    # then have the opposite sign, and are the ones Ebb computed.
    model.clip = RightClip
    model.zero_grad(set_to_none=True)
    nn.functional.mse_loss(model(rooms), power).backward()
    ours = ebb.gradients(trace)
    for name in ("sense.weight", "sense.bias"):
        right = dict(model.named_parameters())[name].grad.to(torch.float64).numpy()
        assert relative_error(-theirs[name], right) <= TOLERANCE[dtype]
        assert relative_error(ours[name], right) <= TOLERANCE[dtype]
        assert relative_error(ours[name], theirs[name]) > 1.5  # ours ≈ −theirs: ‖2·theirs‖ / ‖theirs‖ = 2


# 7. A bf16 autocast step of a seed-germination model: f32 weights, bf16 matmuls.
def test_bf16_autocast(ebb, capture):
    torch.manual_seed(17)
    model = nn.Sequential(nn.Linear(8, 16), nn.GELU(), nn.Linear(16, 4))
    soil = torch.randn(6, 8)
    sprouts = torch.randn(6, 4)

    def step(m):
        with torch.autocast("cpu", dtype=torch.bfloat16):
            out = m(soil)
        return nn.functional.mse_loss(out.float(), sprouts)

    trace, theirs = capture(model, step, "germination")
    header = json.loads(trace.read_text())
    nodes = {n["id"]: n for n in header["nodes"]}
    assert header["dtype"] == "f32"
    casts = [n for n in nodes.values() if n["op"] == "cast"]
    assert {n.get("dtype", "f32") for n in casts} == {"bf16", "f32"}
    # Each linear layer's product: bf16 inputs, kept in the kernel's f32
    # accumulator, rounded once into bf16 with the bias.
    matmuls = [n for n in nodes.values() if n["op"] == "matmul"]
    assert matmuls and all(n.get("dtype", "f32") == "f32" for n in matmuls)
    assert all(nodes[i].get("dtype") == "bf16" for n in matmuls for i in n["inputs"])
    adds = [n for n in nodes.values() if n["op"] == "add" and any(i in {m["id"] for m in matmuls} for i in n["inputs"])]
    assert len(adds) == 2 and all(n["dtype"] == "bf16" for n in adds)
    clean_check(ebb, trace)
    clean_verify(ebb, trace)
    agree(ebb, trace, theirs, torch.float32)


class Confident(nn.Module):
    """A parcel sorter so sure of itself that softmax rounds a probability to 0."""

    def __init__(self) -> None:
        super().__init__()
        self.score = nn.Linear(2, 3)

    def forward(self, x):
        return torch.softmax(self.score(x), dim=-1)


ENTROPY_LINE = 0  # set below: the line of the log in `entropy`


def entropy(p: torch.Tensor) -> torch.Tensor:
    return -(p * torch.log(p)).sum()  # log(0) = −inf, and 0 · −inf = NaN


ENTROPY_LINE = inspect.getsourcelines(entropy)[1] + 1


# 8. A loss that takes the log of an exact zero: check names the origin at the user's line.
@pytest.mark.parametrize("dtype", DTYPES)
def test_log_of_exact_zero(ebb, capture, dtype):
    torch.manual_seed(18)
    model = Confident().to(dtype)
    with torch.no_grad():
        model.score.weight.copy_(torch.tensor([[900.0, 0.0], [0.0, 900.0], [-900.0, -900.0]], dtype=dtype))
    parcels = torch.tensor([[1.0, 0.5], [0.2, 1.0]], dtype=dtype)
    trace, theirs = capture(model, lambda m: entropy(m(parcels)), "sorter")
    status, report = ebb.check(trace)
    assert status == 1
    origin = report["diagnosis"]["first_origin"]
    origins = report["diagnosis"]["origins"]
    node = origins[origin]["node"] if isinstance(origin, int) else origin["node"]
    nodes = {n["id"]: n for n in json.loads(trace.read_text())["nodes"]}
    assert nodes[node]["op"] == "log"
    assert nodes[node]["site"] == f"{Path(__file__).name}:{ENTROPY_LINE}"
    # PyTorch's gradients are NaN too: verify cannot judge them, and says so.
    for grad in theirs.values():
        assert not np.isfinite(grad).all()
    status, result = ebb.verify(trace)
    assert status == 1
    assert any(entry["band"] == "not_finite" for entry in result["suspects"]) or result["sweep_flags"]
