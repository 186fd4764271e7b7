"""The demo traces recorded from PyTorch (traces/recorded_*): regenerated
from their seeds, they match the committed files byte for byte, and each
shows what its story says."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from conftest import REPO

sys.path.insert(0, str(REPO / "src" / "python" / "demos"))
import recorded  # noqa: E402


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory):
    directory = tmp_path_factory.mktemp("demos")
    return recorded.write_all(directory)


def test_committed_demos_match_their_generators(regenerated):
    for fresh in regenerated:
        committed = REPO / "traces" / fresh.name
        assert committed.is_file(), f"{committed} is missing; write it with python src/python/demos/recorded.py traces"
        assert committed.read_bytes() == fresh.read_bytes(), (
            f"{committed} differs from its generator; rewrite it with python src/python/demos/recorded.py traces"
        )


def test_demos_are_small():
    for name in recorded.DEMOS:
        for path in (REPO / "traces" / name, (REPO / "traces" / name).with_suffix(".safetensors")):
            assert path.stat().st_size < 2 * 1024 * 1024, path


def consistent(report: dict) -> None:
    """Every node's value is what its op gives from its recorded inputs."""
    assert not [f for f in report["diagnosis"]["findings"] if f["rule"] == "forward_mismatch"]


def test_recurrent_demo_explodes(ebb):
    status, report = ebb.check(REPO / "traces" / "recorded_rnn_exploding.tape")
    assert status == 1
    consistent(report)
    exploding = {f["node"] for f in report["diagnosis"]["findings"] if f["rule"] == "exploding"}
    assert "cell.weight_hh_l0" in exploding
    norms = {g["id"]: g["norm"] for g in report["gradients"]}
    # 40 hours at a gain of about 1.2 each: the recurrent weight's gradient is
    # five orders of magnitude beyond the head's bias.
    assert norms["cell.weight_hh_l0"] > 1e5 * norms["head.bias"]


def test_f16_demo_flushes_small_gradients_to_zero(ebb):
    trace = REPO / "traces" / "recorded_f16_underflow.tape"
    header = json.loads(trace.read_text())
    assert header["dtype"] == "f32"
    nodes = {n["id"]: n for n in header["nodes"]}
    matmuls = [n for n in nodes.values() if n["op"] == "matmul"]
    assert matmuls and all(nodes[i].get("dtype") == "f16" for n in matmuls for i in n["inputs"])
    status, report = ebb.check(trace)
    assert status == 1
    consistent(report)
    rules = {f["rule"] for f in report["diagnosis"]["findings"]}
    assert "underflow" in rules
    scale = report["diagnosis"]["loss_scale"]
    assert scale is not None
