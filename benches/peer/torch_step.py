"""The PyTorch peer of benches/network.rs: the same networks, timed on CPU.

Builds each network with the shapes of `ebb::demos::networks` (random
weights; timing does not depend on them), runs forward and backward
`repeats` times after a warm-up, and prints one JSON object per network:
the minimum and median seconds of the forward pass and of `loss.backward()`.

Run by the benchmark when a Python with torch is found; by hand:
    python benches/peer/torch_step.py --threads 2 --repeats 20 mlp deep_tanh cnn transformer_stack
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


class Cnn(nn.Module):
    """Two 3x3 convolutions (32 and 64 channels, padding 1, no bias: batch
    normalisation cancels it), each followed by
    batch normalisation (training mode), ReLU and 2x2 max pooling, then a
    linear head on the flattened 64x8x8 features."""

    def __init__(self) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 32, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(32)
        self.conv2 = nn.Conv2d(32, 64, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(64)
        self.head = nn.Linear(64 * 8 * 8, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = nn.functional
        x = f.max_pool2d(f.relu(self.bn1(self.conv1(x))), 2)
        x = f.max_pool2d(f.relu(self.bn2(self.conv2(x))), 2)
        return self.head(x.flatten(1))


def cnn() -> tuple[nn.Module, Callable[[torch.Tensor], torch.Tensor], torch.Tensor]:
    model = Cnn().train()
    x = torch.randn(64, 3, 32, 32)
    targets = torch.randint(0, 10, (64,))
    f = nn.functional
    return model, lambda out: f.nll_loss(f.log_softmax(out, dim=-1), targets), x


class Block(nn.Module):
    """A pre-norm transformer block written out as the Rust recorder writes
    it: x + attention(layer_norm(x)), then x + ff(layer_norm(x)), attention
    as softmax(Q K^T / sqrt(d_head) + M) V with M the causal mask (0 on and
    below the diagonal, -inf above it), no fused kernel, exact GELU."""

    def __init__(self, width: int, heads: int, hidden: int) -> None:
        super().__init__()
        self.heads = heads
        self.ln1 = nn.LayerNorm(width)
        self.q = nn.Linear(width, width)
        # No key bias: it adds the same q.b to every score of a row, which
        # softmax cancels (the Rust recording leaves it out too).
        self.k = nn.Linear(width, width, bias=False)
        self.v = nn.Linear(width, width)
        self.o = nn.Linear(width, width)
        self.ln2 = nn.LayerNorm(width)
        self.up = nn.Linear(width, hidden)
        self.down = nn.Linear(hidden, width)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        batch, tokens, width = x.shape
        head = width // self.heads
        a = self.ln1(x)

        def split(t: torch.Tensor) -> torch.Tensor:
            return t.view(batch, tokens, self.heads, head).transpose(1, 2)

        q, k, v = split(self.q(a)), split(self.k(a)), split(self.v(a))
        mask = torch.full((tokens, tokens), float("-inf")).triu(1)
        weights = torch.softmax(q @ k.transpose(-2, -1) * head**-0.5 + mask, dim=-1)
        mixed = (weights @ v).transpose(1, 2).reshape(batch, tokens, width)
        x = x + self.o(mixed)
        return x + self.down(nn.functional.gelu(self.up(self.ln2(x))))


class TransformerStack(nn.Module):
    """Four blocks (width 256, 4 heads, feed-forward 1024), a final layer
    norm, the mean over the sequence and a linear head onto 10 classes."""

    def __init__(self) -> None:
        super().__init__()
        self.blocks = nn.Sequential(*[Block(256, 4, 1024) for _ in range(4)])
        self.ln = nn.LayerNorm(256)
        self.head = nn.Linear(256, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.ln(self.blocks(x)).mean(dim=1))


def transformer_stack() -> tuple[nn.Module, Callable[[torch.Tensor], torch.Tensor], torch.Tensor]:
    model = TransformerStack()
    x = torch.randn(8, 128, 256)
    targets = torch.randint(0, 10, (8,))
    return model, lambda out: nn.functional.cross_entropy(out, targets), x


NETWORKS = {
    "mlp": mlp,
    "deep_tanh": deep_tanh,
    "cnn": cnn,
    "transformer_stack": transformer_stack,
}


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
