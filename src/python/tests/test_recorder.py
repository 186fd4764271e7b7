"""The recorder's own behaviour: what becomes a node, views and in-place
writes, constants, scope, reported gradients, errors and the files written."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors.numpy import load_file
from torch import nn

import ebb_capture
from conftest import TOLERANCE, relative_error


def nodes_of(trace: Path) -> dict[str, dict]:
    return {n["id"]: n for n in json.loads(trace.read_text())["nodes"]}


def sidecar_of(trace: Path) -> dict[str, np.ndarray]:
    header = json.loads(trace.read_text())
    return load_file(str(trace.parent / header["sidecar"]))


def test_linear_is_split_into_transpose_matmul_and_add(tmp_path):
    torch.manual_seed(1)
    layer = nn.Linear(3, 2)
    x = torch.randn(4, 3)
    path = tmp_path / "linear.tape"
    with ebb_capture.record(path, model=layer) as rec:
        rec.output(layer(x).sum())
    nodes = nodes_of(path)
    assert [n["op"] for n in nodes.values()] == ["param", "transpose", "input", "matmul", "param", "add", "sum"]
    assert nodes["transpose"]["inputs"] == ["weight"] and nodes["transpose"]["attrs"] == {"perm": [1, 0]}
    assert nodes["matmul"]["inputs"] == ["x", "transpose"]
    assert nodes["add"]["inputs"] == ["bias", "matmul"]
    values = sidecar_of(path)
    # The split product carries x·Wᵀ, the add x·Wᵀ + b as the layer computed it.
    np.testing.assert_array_equal(values["matmul"], (x @ layer.weight.t()).detach().numpy())
    np.testing.assert_array_equal(values["add"], layer(x).detach().numpy())


def test_groups_are_module_paths_and_sites_are_the_users_lines(tmp_path):
    class Inner(nn.Module):
        def __init__(self):
            super().__init__()
            self.proj = nn.Linear(2, 2)

        def forward(self, x):
            return torch.tanh(self.proj(x))  # the site of the tanh

    class Outer(nn.Module):
        def __init__(self):
            super().__init__()
            self.layers = nn.ModuleList([Inner(), Inner()])

        def forward(self, x):
            for layer in self.layers:
                x = layer(x)
            return x

    model = Outer()
    path = tmp_path / "groups.tape"
    with ebb_capture.record(path, model=model) as rec:
        rec.output(model(torch.randn(1, 2)).sum())
    nodes = nodes_of(path)
    tanh_line = Inner.forward.__code__.co_firstlineno + 1
    assert nodes["layers.1/tanh"]["group"] == "layers.1"
    assert nodes["layers.1/tanh"]["site"] == f"test_recorder.py:{tanh_line}"
    assert nodes["layers.0/proj/matmul"]["group"] == "layers.0/proj"
    assert "layers.1.proj.weight" in nodes


def test_dropout_mask_is_a_constant_as_drawn(tmp_path):
    torch.manual_seed(2)
    drop = nn.Dropout(0.5)
    x = torch.ones(64)
    path = tmp_path / "dropout.tape"
    with ebb_capture.record(path, model=drop) as rec:
        y = drop(x)
        rec.output(y.sum())
    nodes = nodes_of(path)
    values = sidecar_of(path)
    masks = [i for i, n in nodes.items() if n["op"] == "const" and i in values and values[i].shape == (64,)]
    assert len(masks) == 1
    # y = x · mask: the recorded constant is exactly what the step used.
    np.testing.assert_array_equal(values[masks[0]], y.detach().numpy())
    assert set(np.unique(values[masks[0]])) <= {0.0, 2.0}


def test_no_grad_and_detach_are_constants(tmp_path):
    w = nn.Parameter(torch.tensor([1.0, 2.0]))
    path = tmp_path / "consts.tape"
    with ebb_capture.record(path) as rec:
        with torch.no_grad():
            scale = (w * 3).sum()
        frozen = w.detach() * 2
        rec.output((w * scale).sum() + (w * frozen).sum())
    nodes = nodes_of(path)
    ops = sorted(n["op"] for n in nodes.values())
    # w·scale and w·frozen: scale and frozen are constants, not ops on w.
    assert ops.count("mul") == 2 and ops.count("param") == 1
    muls = [n for n in nodes.values() if n["op"] == "mul"]
    for mul in muls:
        other = [i for i in mul["inputs"] if nodes[i]["op"] != "param"]
        assert len(other) == 1 and nodes[other[0]]["op"] == "const"


def test_reported_gradients_of_params_and_intermediates(tmp_path):
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(3, 4), nn.Sigmoid())
    x = torch.randn(2, 3)
    path = tmp_path / "reported.tape"
    kept = {}
    with ebb_capture.record(path, model=model) as rec:
        hidden = model[0](x)
        hidden.register_hook(lambda g: kept.setdefault("hidden", g))
        loss = model[1](hidden).pow(2).sum()
        rec.output(loss)
        loss.backward()
    nodes = nodes_of(path)
    values = sidecar_of(path)
    assert nodes["0.weight"]["reported"]["tensor"] == "grad/0.weight"
    np.testing.assert_array_equal(values["grad/0.weight"], model[0].weight.grad.numpy())
    np.testing.assert_array_equal(values["grad/0/add"], kept["hidden"].numpy())
    # The product inside the split linear reports the linear's gradient.
    assert nodes["0/matmul"]["reported"]["tensor"] == "grad/0/add"


@pytest.mark.parametrize("kept", ["params", "none"])
def test_gradients_option_keeps_fewer(ebb, tmp_path, kept):
    """gradients="params" keeps only the parameters' reported gradients
    (PyTorch's p.grad, exactly); "none" keeps none."""
    torch.manual_seed(25)
    model = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 1))
    x = torch.randn(6, 3)
    path = tmp_path / f"{kept}.tape"
    with ebb_capture.record(path, model=model, gradients=kept) as rec:
        loss = model(x).pow(2).mean()
        rec.output(loss)
        loss.backward()
    nodes = nodes_of(path)
    carrying = {i for i, n in nodes.items() if "reported" in n}
    names = {name for name, _ in model.named_parameters()}
    if kept == "none":
        assert carrying == set()
        return
    # The output keeps the gradient that reached it too: it is the seed.
    assert carrying == names | {json.loads(path.read_text())["output"]}
    values = sidecar_of(path)
    for name, p in model.named_parameters():
        np.testing.assert_array_equal(values[nodes[name]["reported"]["tensor"]], p.grad.numpy())
    status, result = ebb.verify(path)
    assert status == 0 and len(result["reported"]) == len(names) + 1


def test_without_backward_no_gradients_are_reported(tmp_path):
    layer = nn.Linear(2, 1)
    path = tmp_path / "forward.tape"
    with ebb_capture.record(path, model=layer) as rec:
        rec.output(layer(torch.ones(1, 2)).sum())
    assert not any("reported" in n for n in nodes_of(path).values())
    assert "seed" not in json.loads(path.read_text())


def test_in_place_writes_through_views(ebb, tmp_path):
    torch.manual_seed(4)

    class Mixer(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(4, 6)

        def forward(self, x):
            g = self.lin(x) * 1.0
            g[:, 4].mul_(2.0)  # select, then in place
            g[:, :2].add_(g[:, 2:4])  # slice, in place, reading another slice
            t = g.t()  # a view of the written base
            z = torch.zeros(3, 2)
            z[:, 0] = g[:, 5]  # copy into a view of a constant
            w = g.clone()
            w.relu_()
            return (t * t).sum() + w.sum() + (z * z).sum()

    model = Mixer()
    x = torch.randn(3, 4)
    path = tmp_path / "views.tape"
    with ebb_capture.record(path, model=model) as rec:
        loss = model(x)
        rec.output(loss)
        loss.backward()
    errors = ebb.agreement(path)
    for name, _ in model.named_parameters():
        assert errors[name] <= TOLERANCE[torch.float32], errors
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]


def test_scope_to_a_submodule(ebb, tmp_path):
    torch.manual_seed(5)

    class Block(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(6, 6)
            self.norm = nn.LayerNorm(6)

        def forward(self, x):
            return self.norm(torch.tanh(self.lin(x)) + x)

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = nn.Linear(3, 6)
            self.block = Block()
            self.head = nn.Linear(6, 2)

        def forward(self, x):
            return self.head(self.block(self.embed(x)))

    net = Net()
    x, y = torch.randn(5, 3), torch.randn(5, 2)
    path = tmp_path / "block.tape"
    with ebb_capture.record(path, model=net, module=net.block) as rec:
        loss = nn.functional.mse_loss(net(x), y)
        rec.output(loss)
        loss.backward()
    header = json.loads(path.read_text())
    nodes = nodes_of(path)
    params = {i for i, n in nodes.items() if n["op"] == "param"}
    assert params == {"block.lin.weight", "block.lin.bias", "block.norm.weight", "block.norm.bias"}
    inputs = [n for n in nodes.values() if n["op"] == "input"]
    assert len(inputs) == 1 and inputs[0]["value"]["shape"] == [5, 6]  # the block's input is a leaf
    assert header["seed"]["shape"] == [5, 6]  # the gradient PyTorch sent into the block's output
    errors = ebb.agreement(path)
    for name in params:
        assert errors[name] <= TOLERANCE[torch.float32], errors


def test_scope_called_twice_sums_both_calls(ebb, tmp_path):
    torch.manual_seed(6)
    shared = nn.Linear(3, 3)

    class Twice(nn.Module):
        def __init__(self):
            super().__init__()
            self.shared = shared

        def forward(self, x):
            return self.shared(torch.relu(self.shared(x)))

    model = Twice()
    path = tmp_path / "twice.tape"
    with ebb_capture.record(path, model=model, module=model.shared) as rec:
        loss = model(torch.randn(4, 3)).pow(2).sum()
        rec.output(loss)
        loss.backward()
    errors = ebb.agreement(path)
    for name, _ in model.named_parameters():
        assert errors[name] <= TOLERANCE[torch.float32], errors


def test_error_for_an_op_too_big_for_a_jacobian_names_op_and_line(tmp_path):
    path = tmp_path / "big.tape"
    x = torch.randn(64, 64, requires_grad=True)
    with pytest.raises(ebb_capture.CaptureError) as raised:
        with ebb_capture.record(path, jacobian_limit=100) as rec:
            y = torch.linalg.slogdet(x).logabsdet  # no mapping; a 4096-entry Jacobian
            rec.output(y)
    message = str(raised.value)
    assert "linalg" in message and f"test_recorder.py:" in message and "jacobian_limit" in message
    assert "\n" not in message
    assert not path.exists()
    assert list(tmp_path.iterdir()) == []  # no temporary file left behind


def test_nothing_written_when_the_step_raises(tmp_path):
    path = tmp_path / "failed.tape"
    with pytest.raises(ZeroDivisionError):
        with ebb_capture.record(path) as rec:
            w = nn.Parameter(torch.ones(2))
            rec.output((w * 2).sum())
            1 / 0
    assert list(tmp_path.iterdir()) == []


def test_a_failed_write_keeps_the_previous_trace(tmp_path, monkeypatch):
    path = tmp_path / "keep.tape"
    w = nn.Parameter(torch.ones(3))
    with ebb_capture.record(path) as rec:
        rec.output((w * 2).sum())
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    assert set(before) == {"keep.tape", "keep.safetensors"}

    from ebb_capture.spill import Spill

    def disk_full(self, entries):
        raise OSError("No space left on device")

    monkeypatch.setattr(Spill, "sidecar", disk_full)
    with pytest.raises(OSError, match="No space"):
        with ebb_capture.record(path) as rec:
            rec.output((w * torch.arange(3.0)).sum())
    # Neither file was touched, and no temporary file is left behind.
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before


def test_output_must_come_from_the_step(tmp_path):
    outside = torch.ones(())
    with pytest.raises(ebb_capture.CaptureError, match="rec.output"):
        with ebb_capture.record(tmp_path / "x.tape") as rec:
            rec.output(outside)


def test_missing_output_is_an_error(tmp_path):
    with pytest.raises(ebb_capture.CaptureError, match=r"call rec.output\(loss\)"):
        with ebb_capture.record(tmp_path / "x.tape"):
            nn.Parameter(torch.ones(2)).sum()
    assert list(tmp_path.iterdir()) == []


def test_sidecar_is_valid_safetensors_with_dtypes_and_alignment(tmp_path):
    torch.manual_seed(7)
    model = nn.Linear(3, 2).to(torch.float64)
    x = torch.randn(3)  # f32, 12 bytes: an odd number of 4-byte elements
    path = tmp_path / "typed.tape"
    with ebb_capture.record(path, model=model) as rec:
        loss = model(x.to(torch.float64)).sum()
        rec.output(loss)
        loss.backward()
    raw = (tmp_path / "typed.safetensors").read_bytes()
    n = int.from_bytes(raw[:8], "little")
    assert n % 8 == 0
    header = json.loads(raw[8 : 8 + n])
    widths = {}
    for name, entry in header.items():
        width = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2}[entry["dtype"]]
        widths[name] = width
        assert (8 + n + entry["data_offsets"][0]) % width == 0, name
    assert sorted(set(widths.values())) == [4, 8]
    values = sidecar_of(path)
    np.testing.assert_array_equal(values["weight"], model.weight.detach().numpy())
    assert values["weight"].dtype == np.float64
    assert values["x"].dtype == np.float32
    nodes = nodes_of(path)
    assert nodes["x"]["dtype"] == "f32" and nodes["cast"]["op"] == "cast" and "dtype" not in nodes["cast"]


def test_non_finite_scalars_are_written_as_strings(tmp_path):
    w = nn.Parameter(torch.tensor(0.0))
    path = tmp_path / "inf.tape"
    with ebb_capture.record(path) as rec:
        rec.output(torch.log(w))
    text = path.read_text()
    assert '"value": "-inf"' in text
    json.loads(text)  # still strict JSON


def test_readme_example_runs_as_written(tmp_path, monkeypatch):
    """README's "Recording from PyTorch" example, as written there."""
    readme = (Path(__file__).resolve().parents[3] / "README.md").read_text()
    section = readme.split("## Recording from PyTorch", 1)[1]
    code = section.split("```python", 1)[1].split("```", 1)[0]
    monkeypatch.chdir(tmp_path)
    exec(compile(code, "README.md", "exec"), {})
    assert (tmp_path / "step.tape").is_file() and (tmp_path / "step.safetensors").is_file()
    header = json.loads((tmp_path / "step.tape").read_text())
    assert header["title"] == "epoch 3, batch 41"
    assert any("reported" in n for n in header["nodes"])


def test_fused_attention_is_recorded_through_its_math(ebb, tmp_path):
    torch.manual_seed(8)

    class Attend(nn.Module):
        def __init__(self):
            super().__init__()
            self.q = nn.Linear(8, 8, bias=False)
            self.k = nn.Linear(8, 8, bias=False)
            self.v = nn.Linear(8, 8)

        def forward(self, x):
            split = lambda t: t.view(2, 5, 2, 4).transpose(1, 2)  # noqa: E731
            return nn.functional.scaled_dot_product_attention(split(self.q(x)), split(self.k(x)), split(self.v(x)), is_causal=True)

    model = Attend()
    x, y = torch.randn(2, 5, 8), torch.randn(2, 2, 5, 4)
    path = tmp_path / "attend.tape"
    with ebb_capture.record(path, model=model) as rec:
        loss = nn.functional.mse_loss(model(x), y)
        rec.output(loss)
        loss.backward()
    ops = [n["op"] for n in nodes_of(path).values()]
    assert "softmax" in ops and not [op for op in ops if op.startswith("custom.")]
    errors = ebb.agreement(path)
    for name, _ in model.named_parameters():
        assert errors[name] <= TOLERANCE[torch.float32], errors


def test_lstm_is_recorded_as_its_cell_ops(tmp_path):
    torch.manual_seed(9)
    lstm = nn.LSTM(3, 4)
    path = tmp_path / "lstm.tape"
    with ebb_capture.record(path, model=lstm) as rec:
        rec.output(lstm(torch.randn(6, 1, 3))[0].sum())
    ops = {n["op"] for n in nodes_of(path).values()}
    assert {"sigmoid", "tanh", "matmul", "mul", "add"} <= ops
    assert not [op for op in ops if op.startswith("custom.")]
    assert torch._C._get_mkldnn_enabled()  # the fused kernels are back on after the block


def test_a_big_sidecar_is_finished_in_place(tmp_path, monkeypatch):
    import ebb_capture.spill as spill

    monkeypatch.setattr(spill, "RESERVED", 1024)
    torch.manual_seed(10)
    model = nn.Linear(128, 128)
    x = torch.randn(64, 128)
    path = tmp_path / "big.tape"
    with ebb_capture.record(path, model=model) as rec:
        out = model(x)
        rec.output(out.sum())
    raw = (tmp_path / "big.safetensors").read_bytes()
    assert int.from_bytes(raw[:8], "little") == 1024 - 8  # the header filled the reserved hole
    values = sidecar_of(path)
    np.testing.assert_array_equal(values["weight"], model.weight.detach().numpy())
    np.testing.assert_array_equal(values["add"], out.detach().numpy())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["big.safetensors", "big.tape"]


def test_a_big_sidecar_keeps_its_bulk_in_place_when_a_wider_tensor_is_stored(ebb, tmp_path, monkeypatch):
    """An f32 step with int64 labels: the f32 spill file is the sidecar, the
    labels sit between the header and the f32 data, each tensor at a
    multiple of its element size, and Ebb reads every value back."""
    import ebb_capture.spill as spill

    monkeypatch.setattr(spill, "RESERVED", 8192)
    torch.manual_seed(19)
    model = nn.Linear(4096, 5)
    x = torch.randn(40, 4096)
    labels = torch.tensor([0, 4, 1, 3, 2] * 8)
    path = tmp_path / "labels.tape"
    with ebb_capture.record(path, model=model) as rec:
        logits = model(x)
        loss = nn.functional.cross_entropy(logits, labels)
        rec.output(loss)
        loss.backward()
    raw = (tmp_path / "labels.safetensors").read_bytes()
    n = int.from_bytes(raw[:8], "little")
    entries = json.loads(raw[8 : 8 + n])
    assert 8 + n == 8192 - labels.numel() * 8  # the header and the labels fill the hole
    widths = {"F64": 8, "F32": 4, "I64": 8}
    for name, entry in entries.items():
        assert (8 + n + entry["data_offsets"][0]) % widths[entry["dtype"]] == 0, name
    assert {e["dtype"] for e in entries.values()} == {"F32", "I64"}
    values = sidecar_of(path)
    index = [v for v in values.values() if v.dtype == np.int64]
    assert len(index) == 1
    np.testing.assert_array_equal(index[0], labels.numpy())
    np.testing.assert_array_equal(values["weight"], model.weight.detach().numpy())
    np.testing.assert_array_equal(values["grad/weight"], model.weight.grad.numpy())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["labels.safetensors", "labels.tape"]
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]


def _gradients_agree(ebb, path: Path, params: dict[str, torch.Tensor], tolerance: float) -> None:
    """Ebb's gradient of each named leaf (`ebb gradients`) against PyTorch's."""
    ours = ebb.gradients(path)
    for name, p in params.items():
        assert relative_error(ours[name], p.grad.to(torch.float64).numpy()) <= tolerance, name


def test_an_op_without_a_mapping_is_recorded_through_its_decomposition(ebb, tmp_path):
    """Mish and hard swish have no entry in the op table: PyTorch's own
    decomposition tables give x·tanh(softplus(x)) and x·clamp(x + 3, 0, 6)/6,
    recorded as catalog ops (no custom op), with the gradients PyTorch got."""
    torch.manual_seed(20)
    w = nn.Parameter(torch.randn(6, dtype=torch.float64))
    x = torch.randn(4, 6, dtype=torch.float64) * 4
    path = tmp_path / "decomposed.tape"
    with ebb_capture.record(path) as rec:
        loss = nn.functional.mish(x * w).sum() + nn.functional.hardswish(x * w).pow(2).sum()
        rec.output(loss)
        loss.backward()
    ops = {n["op"] for n in nodes_of(path).values()}
    assert {"softplus", "tanh", "clamp"} <= ops
    assert not [op for op in ops if op.startswith("custom.")]
    _gradients_agree(ebb, path, {"w": w}, TOLERANCE[torch.float64])
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]


def test_a_small_op_without_mapping_or_decomposition_gets_its_jacobian(ebb, tmp_path):
    """A sort, a top-k and a log-determinant have neither: each becomes a
    custom op whose partials come from autograd; Ebb's sweep through them
    gives PyTorch's gradients, and outputs the loss does not use (the
    determinant's sign, top-k's indices) are no trouble."""
    torch.manual_seed(21)
    w = nn.Parameter(torch.randn(4, 4, dtype=torch.float64))
    x = torch.randn(4, 4, dtype=torch.float64)
    path = tmp_path / "custom.tape"
    with ebb_capture.record(path) as rec:
        m = x * w
        loss = (
            torch.sort(m, dim=1).values.pow(2).mul(torch.arange(4.0, dtype=torch.float64)).sum()
            + torch.topk(m, 2, dim=0).values.sum()
            + torch.linalg.slogdet(m + 3 * torch.eye(4, dtype=torch.float64)).logabsdet
        )
        rec.output(loss)
        loss.backward()
    nodes = nodes_of(path)
    custom = {n["op"] for n in nodes.values() if n["op"].startswith("custom.")}
    assert {"custom.sort", "custom.topk", "custom._linalg_slogdet"} <= custom
    for n in nodes.values():
        if n["op"].startswith("custom."):
            assert len(n["partials"]) == len(n["inputs"])
    _gradients_agree(ebb, path, {"w": w}, TOLERANCE[torch.float64])
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]


def test_advanced_indexing_is_a_gather(ebb, tmp_path):
    """x[i], x[:, i], x[i, :, j] (apart: PyTorch puts the index axes first),
    x[..., i] with a 2-D index, negative and repeated picks, nearest
    upsampling and a flip: all recorded as catalog ops (a gather along the indexed
    axes merged into one), no custom op; repeated picks add their adjoints."""
    torch.manual_seed(26)
    w = nn.Parameter(torch.randn(4, 5, 6, dtype=torch.float64))
    i = torch.tensor([3, -1, 0, 3])
    j = torch.tensor([[1, 5], [5, 0]])
    image = nn.Upsample(scale_factor=2, mode="nearest")
    weights = [torch.randn(s, dtype=torch.float64) for s in [(4, 5, 6), (4, 4, 6), (4, 5), (4, 5, 2, 2), (1, 4, 10, 12), (4, 5, 6)]]
    path = tmp_path / "index.tape"
    with ebb_capture.record(path) as rec:
        y = w * 1.5
        picks = [y[i], y[:, i], y[i, :, i], y[..., j], image(y.unsqueeze(0)), y.flip([0, 2])]
        loss = sum((p * k).sum() for p, k in zip(picks, weights))
        rec.output(loss)
        loss.backward()
    nodes = nodes_of(path)
    assert not [n for n in nodes.values() if n["op"].startswith("custom.")]
    assert sum(n["op"] == "gather" for n in nodes.values()) >= 4
    _gradients_agree(ebb, path, {"w": w}, TOLERANCE[torch.float64])
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]
    # Each pick's recorded value is PyTorch's, and Ebb's gather recomputes it.
    status, report = ebb.check(path)
    assert report["diagnosis"]["forward"]["checked"] == len(nodes) - sum(n["op"] in ("param", "input", "const") for n in nodes.values())
    assert not [f for f in report["diagnosis"]["findings"] if f["rule"] == "forward_mismatch"]


def test_unused_outputs_of_a_multi_output_op(ebb, tmp_path):
    """unbind gives four rows; the loss reads two, so PyTorch sends no
    gradient into the others (their hooks see None)."""
    w = nn.Parameter(torch.arange(1.0, 13.0).reshape(4, 3))
    path = tmp_path / "unbind.tape"
    with ebb_capture.record(path) as rec:
        rows = (w * 2).unbind(0)
        loss = (rows[0] * rows[2]).sum()
        rec.output(loss)
        loss.backward()
    ours = ebb.gradients(path)
    # ∂/∂w of Σ 4·w₀·w₂: 4·w₂ in row 0, 4·w₀ in row 2, zeros elsewhere.
    expected = np.zeros((4, 3))
    expected[0] = 4 * np.arange(7.0, 10.0)
    expected[2] = 4 * np.arange(1.0, 4.0)
    np.testing.assert_array_equal(ours["w"], expected)
    np.testing.assert_array_equal(w.grad.numpy(), expected)


def test_outputs_autograd_does_not_differentiate_are_constants(ebb, tmp_path):
    """Layer norm's mean and reciprocal deviation are outputs PyTorch's
    autograd gives no gradient (constants to its backward, although their
    inputs require one): read by the loss, they are constants in the trace
    too, so the trace's gradients are the step's."""
    torch.manual_seed(22)
    w = nn.Parameter(torch.randn(6, dtype=torch.float64))
    x = torch.randn(4, 6, dtype=torch.float64)
    weights = torch.randn(4, 6, dtype=torch.float64)
    path = tmp_path / "stats.tape"
    with ebb_capture.record(path) as rec:
        out, mean, rstd = torch.native_layer_norm(x * w, [6], None, None, 1e-5)
        loss = (out * weights).sum() + (mean * mean).sum() + rstd.sum()
        rec.output(loss)
        loss.backward()
    ops = [n["op"] for n in nodes_of(path).values()]
    assert "layer_norm" in ops and not {"mean", "var", "rsqrt"} & set(ops)
    # Only the normalised output carries w's gradient: the statistics' terms
    # are constants to PyTorch's backward.
    assert not np.allclose(w.grad.numpy(), 0)
    _gradients_agree(ebb, path, {"w": w}, TOLERANCE[torch.float64])
    status, result = ebb.verify(path)
    assert status == 0, result["suspects"]


def test_a_random_op_with_a_derivative_is_a_clear_error(tmp_path):
    """rrelu in training mode draws its slopes inside an op with a
    derivative: nothing faithful can be recorded, so the recording stops
    with one line naming the op, the user's line and what to do."""
    w = nn.Parameter(torch.randn(5))
    path = tmp_path / "rrelu.tape"
    with pytest.raises(ebb_capture.CaptureError) as raised:
        with ebb_capture.record(path) as rec:
            y = nn.functional.rrelu(w - 0.5, training=True)  # the line named
            rec.output(y.sum())
    line = test_a_random_op_with_a_derivative_is_a_clear_error.__code__.co_firstlineno + 8
    message = str(raised.value)
    assert "rrelu_with_noise" in message and f"test_recorder.py:{line};" in message and "eval()" in message
    assert "\n" not in message
    assert list(tmp_path.iterdir()) == []


def test_every_op_the_package_writes_is_in_ebbs_catalog(ebb):
    from ebb_capture.optable import catalog

    listed = ebb.run("ops")
    assert listed.returncode == 0
    ops = {line.split()[0] for line in listed.stdout.splitlines()[1:] if line.strip()}
    assert catalog.PRESENT <= ops, catalog.PRESENT - ops
