"""Capture overhead of ebb_capture on the transformer block stack of the
network bench (benches/network.rs, src/demos/networks.rs): 4 pre-norm
blocks, d_model 256, 4 heads, feed-forward 1024 with GELU, sequence 128,
batch 8, f32. Each block is x + attn(layer_norm(x)), then
x + ff(layer_norm(x)), attention softmax(QKᵀ/√d_head)·V with Q, K, V and
O projections; then a final layer norm, the mean over the sequence, a
linear layer 256 → 10 and cross-entropy. One step recorded against the
same step run plainly, in the same run.

    python benches/capture.py [--repeats 5] [--threads 2]

Prints, each as the minimum and median over the repeats (the machine is
shared, so minimums are the steadier figure):
- the plain forward + backward;
- the same step inside `ebb_capture.record`, in all (interception,
  mapping, reported-gradient hooks, storing tensors and writing the
  files), and its parts: the recording without the writing, and the
  writing (storing each tensor as its op completes, then the JSON header
  and the sidecar's assembly);
- one plain write of the sidecar's number of bytes to the same directory
  (page-cache speed; neither calls fsync): the disk-speed budget;
- the target: recorded step ≤ 3 × plain step + that write;
- peak memory, each in a fresh process that runs one step: the step's own
  peak over what the process held before it (VmHWM after resetting it
  through /proc/self/clear_refs, minus VmRSS then), and the whole
  process's peak (torch's own footprint included), plain and recorded,
  with the ratios.

Needs torch, numpy and safetensors (the venv `.ci/run` keeps in
~/.cache/ebb-venv has them) and `ebb_capture` (pip install ./src/python,
or run from the repository: the script puts src/python on the path).
"""

from __future__ import annotations

import argparse
import json
import math
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

WIDTH, HEADS, FEED, LAYERS, SEQUENCE, BATCH, CLASSES = 256, 4, 1024, 4, 128, 8, 10


class Attention(nn.Module):
    """softmax(QKᵀ/√d_head)·V over 4 heads, with Q, K, V and O projections."""

    def __init__(self) -> None:
        super().__init__()
        self.q = nn.Linear(WIDTH, WIDTH)
        self.k = nn.Linear(WIDTH, WIDTH)
        self.v = nn.Linear(WIDTH, WIDTH)
        self.o = nn.Linear(WIDTH, WIDTH)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        batch, sequence, _ = x.shape
        head = WIDTH // HEADS

        def split(t: torch.Tensor) -> torch.Tensor:
            return t.view(batch, sequence, HEADS, head).transpose(1, 2)

        q, k, v = split(self.q(x)), split(self.k(x)), split(self.v(x))
        weights = torch.softmax(q @ k.transpose(-2, -1) / math.sqrt(head), dim=-1)
        mixed = (weights @ v).transpose(1, 2).reshape(batch, sequence, WIDTH)
        return self.o(mixed)


class Block(nn.Module):
    """Pre-norm block: x + attn(layer_norm(x)), then x + ff(layer_norm(x))."""

    def __init__(self) -> None:
        super().__init__()
        self.ln1 = nn.LayerNorm(WIDTH)
        self.attn = Attention()
        self.ln2 = nn.LayerNorm(WIDTH)
        self.ff = nn.Sequential(nn.Linear(WIDTH, FEED), nn.GELU(), nn.Linear(FEED, WIDTH))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x + self.attn(self.ln1(x))
        return x + self.ff(self.ln2(x))


class Stack(nn.Module):
    """The blocks, a final layer norm, the mean over the sequence, 256 → 10."""

    def __init__(self) -> None:
        super().__init__()
        self.blocks = nn.ModuleList([Block() for _ in range(LAYERS)])
        self.ln = nn.LayerNorm(WIDTH)
        self.head = nn.Linear(WIDTH, CLASSES)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        for block in self.blocks:
            x = block(x)
        return self.head(self.ln(x).mean(dim=1))


def setup() -> tuple[Stack, torch.Tensor, torch.Tensor]:
    torch.manual_seed(0)
    model = Stack()
    return model, torch.randn(BATCH, SEQUENCE, WIDTH), torch.randint(0, CLASSES, (BATCH,))


def plain_step(model: Stack, x: torch.Tensor, y: torch.Tensor) -> None:
    model.zero_grad(set_to_none=True)
    loss = nn.functional.cross_entropy(model(x), y)
    loss.backward()


def recorded_step(model: Stack, x: torch.Tensor, y: torch.Tensor, path: Path) -> ebb_capture.Recording:
    model.zero_grad(set_to_none=True)
    with ebb_capture.record(path, model=model, title="transformer block stack") as rec:
        loss = nn.functional.cross_entropy(model(x), y)
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


def peak_memory(kind: str) -> tuple[int, int]:
    """One step in a process that has run none yet (so that freed memory the
    allocator kept does not hide the step's needs): the bytes of its peak
    resident memory over what the process held before it, and the
    process's peak resident memory from its start (VmHWM: what ru_maxrss
    reports, except that Linux carries ru_maxrss over from the parent
    across exec, so a child of this bench would report the bench's own)."""
    import torch._dynamo  # noqa: F401  (the dispatch mode imports it on first use)

    model, x, y = setup()
    with tempfile.TemporaryDirectory(dir=_scratch()) as directory:
        start = _status("VmHWM")  # imports and set-up
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")  # resets VmHWM to the current resident size
        before = _status("VmRSS")
        if kind == "plain":
            plain_step(model, x, y)
        else:
            recorded_step(model, x, y, Path(directory) / "step.tape")
        peak = _status("VmHWM")
    return peak - before, max(start, peak)


def _scratch() -> Path | None:
    """Where the traces go: the shared target directory when there is one
    (on the same disk as the repository), else the system's temporary one."""
    for candidate in (os.environ.get("CARGO_TARGET_DIR"), REPO / "target"):
        if candidate and Path(candidate).is_dir():
            return Path(candidate)
    return None


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
        print(*peak_memory(args.memory))
        return

    model, x, y = setup()
    with tempfile.TemporaryDirectory(dir=_scratch()) as tmp:
        directory = Path(tmp)
        plain_step(model, x, y)
        recorded_step(model, x, y, directory / "warm.tape")  # imports and first-use costs
        (directory / "warm.tape").unlink()
        (directory / "warm.safetensors").unlink()
        plain, recorded, capture, write, raw = [], [], [], [], []
        sidecar_bytes = 0
        for _ in range(args.repeats):
            start = time.perf_counter()
            plain_step(model, x, y)
            plain.append(time.perf_counter() - start)
            # A new trace each time, as the plain write makes a new file
            # (replacing a trace frees the old one's blocks first).
            for old in directory.iterdir():
                old.unlink()
            start = time.perf_counter()
            rec = recorded_step(model, x, y, directory / "step.tape")
            total = time.perf_counter() - start
            recorded.append(total)
            # Storing tensors while the step runs and writing the files at
            # the end are the sidecar's writing; the rest is the recording.
            io = rec.seconds["store"] + rec.seconds["write"]
            write.append(io)
            capture.append(total - io)
            sidecar_bytes = (directory / "step.safetensors").stat().st_size
            raw.append(raw_write_seconds(directory, sidecar_bytes))
        nodes = len(rec.nodes)
        header_bytes = (directory / "step.tape").stat().st_size

    memory: dict[str, tuple[int, int]] = {}
    for kind in ("plain", "capture"):
        done = subprocess.run(
            [sys.executable, __file__, "--memory", kind, "--threads", str(args.threads)],
            check=True,
            capture_output=True,
            text=True,
        )
        step, maxrss = map(int, done.stdout.split()[-2:])
        memory[kind] = (step, maxrss)

    def both(values: list[float]) -> str:
        return f"min {min(values) * 1e3:.0f} ms, median {statistics.median(values) * 1e3:.0f} ms"

    budget = 3 * min(plain) + min(raw)
    mib = 2**20
    print(f"transformer block stack: {LAYERS} pre-norm blocks, d_model {WIDTH}, {HEADS} heads, feed-forward {FEED}, sequence {SEQUENCE}, batch {BATCH}, f32; torch {torch.__version__}, {args.threads} threads, {args.repeats} repeats")
    print(f"trace: {nodes} nodes; header {header_bytes / 1e6:.2f} MB, sidecar {sidecar_bytes / 1e6:.1f} MB")
    print(f"plain forward + backward   {both(plain)}")
    print(f"recorded step, in all      {both(recorded)}  ({min(recorded) / min(plain):.2f}x the plain step, minimums)")
    print(f"  recording, not writing   {both(capture)}  ({min(capture) / min(plain):.2f}x the plain step)")
    print(f"  writing the trace        {both(write)}  ({min(write) / min(raw):.2f}x one plain write of as many bytes)")
    print(f"one plain write, sidecar's size  {both(raw)}")
    print(f"target 3 x plain + plain write = {budget * 1e3:.0f} ms: recorded {min(recorded) * 1e3:.0f} ms ({min(recorded) / budget:.2f} of it)")
    print(
        f"peak memory of the step    plain {memory['plain'][0] / mib:.0f} MiB, recorded {memory['capture'][0] / mib:.0f} MiB "
        f"({memory['capture'][0] / memory['plain'][0]:.2f}x)"
    )
    print(
        f"peak of the whole process  plain {memory['plain'][1] / mib:.0f} MiB, recorded {memory['capture'][1] / mib:.0f} MiB "
        f"({memory['capture'][1] / memory['plain'][1]:.2f}x)"
    )
    print(json.dumps({"plain_s": plain, "recorded_s": recorded, "capture_s": capture, "write_s": write, "raw_write_s": raw, "memory": memory, "sidecar_bytes": sidecar_bytes}))


if __name__ == "__main__":
    main()
