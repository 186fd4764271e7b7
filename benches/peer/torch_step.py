"""The PyTorch peer of benches/network.rs: the same networks, timed on CPU.

Builds each network with the shapes of `ebb::demos::networks` (random
weights; timing does not depend on them), runs forward and backward
`repeats` times after a warm-up, and prints one JSON object per network:
the minimum and median seconds of the forward pass and of `loss.backward()`.

Run by the benchmark when a Python with torch is found; by hand:
    python benches/peer/torch_step.py --threads 2 --repeats 20 mlp deep_tanh
"""

from __future__ import annotations

import argparse
import json
import statistics
import time
from typing import Callable

import torch
from torch import nn


def mlp() -> tuple[nn.Module, Callable[[torch.Tensor], torch.Tensor], torch.Tensor]:
    widths = [784, 1024, 1024, 10]
    layers: list[nn.Module] = []
    for i, (a, b) in enumerate(zip(widths, widths[1:])):
        layers.append(nn.Linear(a, b))
        if i + 2 < len(widths):
            layers.append(nn.ReLU())
    model = nn.Sequential(*layers)
    x = torch.randn(256, 784)
    targets = torch.randint(0, 10, (256,))
    return model, lambda out: nn.functional.cross_entropy(out, targets), x


def deep_tanh() -> tuple[nn.Module, Callable[[torch.Tensor], torch.Tensor], torch.Tensor]:
    layers: list[nn.Module] = []
    for _ in range(32):
        layers += [nn.Linear(256, 256), nn.Tanh()]
    model = nn.Sequential(*layers)
    x = torch.randn(64, 256)
    target = torch.zeros(64, 256)
    return model, lambda out: nn.functional.mse_loss(out, target), x


NETWORKS = {"mlp": mlp, "deep_tanh": deep_tanh}


def time_network(name: str, repeats: int) -> dict[str, object]:
    model, loss_of, x = NETWORKS[name]()
    forward: list[float] = []
    backward: list[float] = []
    for run in range(repeats + 2):
        model.zero_grad(set_to_none=True)
        start = time.perf_counter()
        loss = loss_of(model(x))
        middle = time.perf_counter()
        loss.backward()
        end = time.perf_counter()
        if run >= 2:  # the first runs warm caches and allocators
            forward.append(middle - start)
            backward.append(end - middle)
    return {
        "network": name,
        "threads": torch.get_num_threads(),
        "torch": torch.__version__,
        "forward_min_s": min(forward),
        "forward_median_s": statistics.median(forward),
        "backward_min_s": min(backward),
        "backward_median_s": statistics.median(backward),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("networks", nargs="+", choices=sorted(NETWORKS))
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=20)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    for name in args.networks:
        print(json.dumps(time_network(name, args.repeats)), flush=True)


if __name__ == "__main__":
    main()
