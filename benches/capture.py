"""Capture overhead of ebb_capture on a transformer block stack (4 pre-norm
layers, width 256, 4 heads, sequence 128, batch 8, layer norm, GELU, causal
attention): one step recorded against the same step run plainly.

    python benches/capture.py [--repeats 5] [--threads 2]

Prints, each as the minimum and median over the repeats (the machine is
shared, so minimums are the steadier figure):
- the plain forward + backward;
- the same step inside `ebb_capture.record`, without the time spent writing
  tensors (interception, mapping, reported-gradient hooks, partials), and
  the ratio to the plain step;
- writing the trace: storing each tensor as its op completes, then the JSON
  header and the sidecar's assembly, against writing the sidecar's number
  of bytes to the same directory in one call (page-cache speed; neither
  calls fsync);
- peak memory of the step over what the process held before it, plain and
  recorded (each the first step of a fresh process, read from
  /proc/self/status's VmHWM after resetting it), and the ratio.

Needs torch, numpy and safetensors (the venv `.ci/run` keeps in
~/.cache/ebb-venv has them) and `ebb_capture` (pip install ./src/python,
or run from the repository: the script puts src/python on the path).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "src" / "python"))

import torch  # noqa: E402
from torch import nn  # noqa: E402

import ebb_capture  # noqa: E402

WIDTH, HEADS, LAYERS, SEQUENCE, BATCH = 256, 4, 4, 128, 8


class Block(nn.Module):
    """Pre-norm transformer block: causal self-attention, then a GELU MLP."""

    def __init__(self) -> None:
        super().__init__()
        self.ln1 = nn.LayerNorm(WIDTH)
        self.attn = nn.MultiheadAttention(WIDTH, HEADS, batch_first=True)
        self.ln2 = nn.LayerNorm(WIDTH)
        self.mlp = nn.Sequential(nn.Linear(WIDTH, 4 * WIDTH), nn.GELU(approximate="tanh"), nn.Linear(4 * WIDTH, WIDTH))

    def forward(self, x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        a = self.ln1(x)
        x = x + self.attn(a, a, a, attn_mask=mask, need_weights=False, is_causal=True)[0]
        return x + self.mlp(self.ln2(x))


class Stack(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.blocks = nn.ModuleList([Block() for _ in range(LAYERS)])

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        mask = torch.triu(torch.full((x.shape[1], x.shape[1]), float("-inf")), 1)
        for block in self.blocks:
            x = block(x, mask)
        return x


def setup() -> tuple[Stack, torch.Tensor, torch.Tensor]:
    torch.manual_seed(0)
    model = Stack()
    return model, torch.randn(BATCH, SEQUENCE, WIDTH), torch.randn(BATCH, SEQUENCE, WIDTH)


def plain_step(model: Stack, x: torch.Tensor, y: torch.Tensor) -> None:
    model.zero_grad(set_to_none=True)
    loss = nn.functional.mse_loss(model(x), y)
    loss.backward()


def recorded_step(model: Stack, x: torch.Tensor, y: torch.Tensor, path: Path) -> ebb_capture.Recording:
    model.zero_grad(set_to_none=True)
    with ebb_capture.record(path, model=model, title="transformer block stack") as rec:
        loss = nn.functional.mse_loss(model(x), y)
        rec.output(loss)
        loss.backward()
    return rec


def raw_write_seconds(directory: Path, size: int) -> float:
    data = bytearray(size)
    path = directory / "raw.bin"
    start = time.perf_counter()
    with open(path, "wb") as f:
        f.write(data)
    seconds = time.perf_counter() - start
    path.unlink()
    return seconds


def peak_memory(kind: str) -> int:
    """Bytes of peak resident memory of one step over the process's resident
    memory before it, in a process that has run no step yet (so that freed
    memory the allocator kept does not hide the step's needs)."""
    import torch._dynamo  # noqa: F401  (the dispatch mode imports it on first use)

    model, x, y = setup()
    with tempfile.TemporaryDirectory() as directory:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")  # resets VmHWM to the current resident size
        before = _status("VmRSS")
        if kind == "plain":
            plain_step(model, x, y)
        else:
            recorded_step(model, x, y, Path(directory) / "step.tape")
        return _status("VmHWM") - before


def _status(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {field} in /proc/self/status")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--memory", choices=["plain", "capture"], help=argparse.SUPPRESS)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    if args.memory:
        print(peak_memory(args.memory))
        return

    model, x, y = setup()
    with tempfile.TemporaryDirectory(dir=REPO / "target" if (REPO / "target").is_dir() else None) as tmp:
        directory = Path(tmp)
        plain_step(model, x, y)
        recorded_step(model, x, y, directory / "warm.tape")  # imports and first-use costs
        plain, capture, write, raw = [], [], [], []
        sidecar_bytes = 0
        for _ in range(args.repeats):
            start = time.perf_counter()
            plain_step(model, x, y)
            plain.append(time.perf_counter() - start)
            start = time.perf_counter()
            rec = recorded_step(model, x, y, directory / "step.tape")
            total = time.perf_counter() - start
            # Storing tensors while the step runs and writing the files at
            # the end are the sidecar's writing; the rest is the recording.
            io = rec.seconds["store"] + rec.seconds["write"]
            write.append(io)
            capture.append(total - io)
            sidecar_bytes = (directory / "step.safetensors").stat().st_size
            raw.append(raw_write_seconds(directory, sidecar_bytes))
        nodes = len(rec.nodes)
        header_bytes = (directory / "step.tape").stat().st_size

    memory = {}
    for kind in ("plain", "capture"):
        done = subprocess.run(
            [sys.executable, __file__, "--memory", kind, "--threads", str(args.threads)],
            check=True,
            capture_output=True,
            text=True,
        )
        memory[kind] = int(done.stdout.split()[-1])

    def both(values: list[float]) -> str:
        return f"min {min(values) * 1e3:.0f} ms, median {statistics.median(values) * 1e3:.0f} ms"

    print(f"transformer block stack: {LAYERS} layers, width {WIDTH}, {HEADS} heads, sequence {SEQUENCE}, batch {BATCH}; torch {torch.__version__}, {args.threads} threads, {args.repeats} repeats")
    print(f"trace: {nodes} nodes; header {header_bytes / 1e6:.2f} MB, sidecar {sidecar_bytes / 1e6:.1f} MB")
    print(f"plain forward + backward   {both(plain)}")
    print(f"recorded, without writing  {both(capture)}  ({min(capture) / min(plain):.2f}x the plain step, minimums)")
    print(f"writing the trace          {both(write)}  ({min(write) / min(raw):.2f}x one write of as many bytes: {both(raw)})")
    print(f"peak memory of the step    plain {memory['plain'] / 2**20:.0f} MiB, recorded {memory['capture'] / 2**20:.0f} MiB ({memory['capture'] / memory['plain']:.2f}x)")
    print(json.dumps({"plain_s": plain, "capture_s": capture, "write_s": write, "raw_write_s": raw, "memory": memory, "sidecar_bytes": sidecar_bytes}))


if __name__ == "__main__":
    main()
