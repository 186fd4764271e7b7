"""The demo traces in traces/ that are recorded from PyTorch, generated from
fixed seeds (scenarios of our own invention). Regenerate them with

    python src/python/demos/recorded.py traces/

`src/python/tests/test_demos.py` regenerates them and checks the committed
files byte for byte.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Callable

import torch
from torch import nn

import ebb_capture


class DemandForecaster(nn.Module):
    """A town's electricity demand in the next hour from the last 40 hours
    (temperature, hour of day, demand): a ReLU recurrent cell whose
    hidden-to-hidden weight is a little above the identity, so every hour
    multiplies the adjoint by about 1.2."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.RNN(3, 12, nonlinearity="relu", batch_first=True)
        self.head = nn.Linear(12, 1)

    def forward(self, hours: torch.Tensor) -> torch.Tensor:
        states, _ = self.cell(hours)
        return self.head(states[:, -1])


def exploding_rnn(path: Path) -> None:
    torch.manual_seed(20261202)
    model = DemandForecaster()
    with torch.no_grad():
        noise = torch.randn(12, 12) * 0.02
        model.cell.weight_hh_l0.copy_(torch.eye(12) * 1.2 + noise)
        model.cell.weight_ih_l0.mul_(0.5)
    hours = torch.rand(4, 40, 3)
    demand = torch.rand(4, 1)
    model.zero_grad()
    with ebb_capture.record(
        path,
        model=model,
        title="electricity demand: a ReLU recurrent cell over 40 hours",
        description="Next-hour demand from 40 hours of readings; the recurrent weight is 1.2 times the identity, so the adjoint grows about 1.2-fold per hour back through the unroll.",
    ) as rec:
        loss = nn.functional.mse_loss(model(hours), demand)
        rec.output(loss)
        loss.backward()


class OxygenModel(nn.Module):
    """Dissolved oxygen in a fish farm's pens from six sensor readings."""

    def __init__(self) -> None:
        super().__init__()
        self.layers = nn.Sequential(
            nn.Linear(6, 32), nn.Tanh(), nn.Linear(32, 32), nn.Tanh(), nn.Linear(32, 1)
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layers(x)


def f16_underflow(path: Path) -> None:
    torch.manual_seed(20261203)
    model = OxygenModel()
    with torch.no_grad():
        for layer in model.layers:
            if isinstance(layer, nn.Linear):
                layer.weight.mul_(0.3)
    sensors = torch.randn(64, 6)
    with torch.no_grad(), torch.autocast("cpu", dtype=torch.float16):
        fitted = model(sensors).float()
    # Nearly converged: the targets sit 1e-4 from the predictions.
    oxygen = fitted + 1e-4 * torch.randn(64, 1)
    model.zero_grad()
    with ebb_capture.record(
        path,
        model=model,
        title="fish farm oxygen: a nearly converged f16 autocast step",
        description="f32 weights, f16 matmuls and activations under autocast, no loss scaling; the residuals are about 1e-4, so the first layer's gradients fall below f16's smallest subnormal and flush to zero.",
    ) as rec:
        with torch.autocast("cpu", dtype=torch.float16):
            predicted = model(sensors)
        loss = nn.functional.mse_loss(predicted.float(), oxygen)
        rec.output(loss)
        loss.backward()


DEMOS: dict[str, Callable[[Path], None]] = {
    "recorded_rnn_exploding.tape": exploding_rnn,
    "recorded_f16_underflow.tape": f16_underflow,
}


def write_all(directory: Path) -> list[Path]:
    """Writes every recorded demo into `directory`; returns the files written."""
    torch.set_num_threads(1)
    written = []
    for name, make in DEMOS.items():
        path = directory / name
        make(path)
        written += [path, path.with_suffix(".safetensors")]
    return written


if __name__ == "__main__":
    for path in write_all(Path(sys.argv[1] if len(sys.argv) > 1 else "traces")):
        print(path)
