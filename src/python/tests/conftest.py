"""Shared fixtures: the `ebb` binary, and running it on recorded traces.

The binary is `$EBB_BIN` when set (CI sets it to the build it just tested);
otherwise it is built once per session with `cargo build --release`.
"""

from __future__ import annotations

import json
import os
import subprocess
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest
import torch
from safetensors.numpy import load_file

REPO = Path(__file__).resolve().parents[3]

# Small models, two cores shared with everyone: one thread keeps the suite
# quick and its numbers reproducible.
torch.set_num_threads(1)


@pytest.fixture(scope="session")
def ebb_bin() -> Path:
    given = os.environ.get("EBB_BIN")
    if given:
        path = Path(given)
        if not path.is_file():
            pytest.fail(f"EBB_BIN={given} is not a file")
        return path
    subprocess.run(["cargo", "build", "--release", "--quiet", "--bin", "ebb"], cwd=REPO, check=True)
    return Path(os.environ.get("CARGO_TARGET_DIR") or REPO / "target") / "release" / "ebb"


@dataclass
class Ebb:
    """Runs the `ebb` binary."""

    binary: Path

    def run(self, *args: str | os.PathLike[str]) -> subprocess.CompletedProcess[str]:
        return subprocess.run([str(self.binary), *map(str, args)], capture_output=True, text=True, timeout=300)

    def check(self, trace: Path) -> tuple[int, dict[str, Any]]:
        """`ebb check --json`: its exit status and report (status 2 fails the test)."""
        done = self.run("check", "--json", trace)
        if done.returncode == 2:
            pytest.fail(f"ebb check could not read {trace}: {done.stderr.strip()}")
        return done.returncode, json.loads(done.stdout)

    def verify(self, trace: Path, *options: str) -> tuple[int, dict[str, Any]]:
        """`ebb verify --json`: its exit status and result."""
        done = self.run("verify", "--json", *options, trace)
        if done.returncode == 2:
            pytest.fail(f"ebb verify could not read {trace}: {done.stderr.strip()}")
        return done.returncode, json.loads(done.stdout)

    def gradients(self, trace: Path) -> dict[str, np.ndarray]:
        """Every parameter's gradient as Ebb's sweep computes it, in full,
        from `ebb gradients TRACE -o FILE.safetensors` (widened to f64)."""
        out = trace.with_name(trace.stem + ".gradients.safetensors")
        done = self.run("gradients", trace, "-o", out)
        if done.returncode != 0:
            pytest.fail(f"ebb gradients {trace} exited with {done.returncode}: {done.stderr.strip()}")
        return {name: array.astype(np.float64) for name, array in load_file(str(out)).items()}

    def agreement(self, trace: Path) -> dict[str, float]:
        """For every node carrying a gradient PyTorch reported: the worst
        entry's relative error between it and Ebb's sweep, each entry measured
        against the tensor's scale, |a − b| / max(|a| + |b|, max |g|), as
        `ebb verify` reports it."""
        _, result = self.verify(trace)
        return {entry["node"]: entry["relative"] for entry in result["reported"]}


@pytest.fixture(scope="session")
def ebb(ebb_bin: Path) -> Ebb:
    return Ebb(ebb_bin)


def relative_error(ours: np.ndarray, theirs: np.ndarray) -> float:
    """‖ours − theirs‖ / ‖theirs‖ (0 when both are zero)."""
    scale = float(np.linalg.norm(theirs))
    diff = float(np.linalg.norm(ours - theirs))
    if scale == 0.0:
        return 0.0 if diff == 0.0 else float("inf")
    return diff / scale


# Agreement of Ebb's gradient with PyTorch's, per dtype of the run: 1e-5 for
# f32 runs, 1e-12 for f64 runs (a few hundred roundings of each format's unit
# roundoff, 6e-8 and 1.1e-16).
TOLERANCE = {torch.float32: 1e-5, torch.float64: 1e-12}


def torch_gradients(model: torch.nn.Module) -> dict[str, np.ndarray]:
    return {
        name: p.grad.detach().to(torch.float64).numpy()
        for name, p in model.named_parameters()
        if p.grad is not None
    }


@pytest.fixture
def capture(tmp_path: Path) -> Callable[..., tuple[Path, dict[str, np.ndarray]]]:
    """Records one step of `model` (loss from `step(model)`, then backward)
    into a trace under tmp_path; returns the trace and PyTorch's gradients."""
    import ebb_capture

    def run(model: torch.nn.Module, step: Callable[[torch.nn.Module], torch.Tensor], name: str = "step", **options: Any) -> tuple[Path, dict[str, np.ndarray]]:
        model.zero_grad(set_to_none=True)
        path = tmp_path / f"{name}.tape"
        with ebb_capture.record(path, model=model, title=name, **options) as rec:
            loss = step(model)
            rec.output(loss)
            loss.backward()
        return path, torch_gradients(model)

    return run
