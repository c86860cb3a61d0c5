"""What adoption refuses, and the .pt2 reader that runs no code from the file.

Each refusal is one sentence, a non-zero exit and no workspace written. Outside
references: Python's ``pickle`` (the crafted payload really runs code when unpickled),
torch's own ``torch.export.load`` (it runs the same payload hidden in an archive's
sample inputs), onnx's graph protos (the adopted graph's nodes are the file's, unchanged).
"""

from __future__ import annotations

import copy
import hashlib
import io
import json
import pickle
import warnings
import zipfile
from pathlib import Path

import numpy as np
import onnx
import pytest
import torch
import torch.nn as nn
import yaml
from adopt_helpers import small_cnn
from conftest import flop_macs

import colonnade
from colonnade.app.adopt import adopt_workspace
from colonnade.app.export import export_task
from colonnade.cli import main
from colonnade.costing import costs, sizing
from colonnade.errors import ColonnadeError, DataError, SpecError, UsageError
from colonnade.files.store import load, save
from colonnade.model.adopted import ADOPTED_FILE, adopt_onnx
from colonnade.model.exported import load_exported_program
from colonnade.model.taps import OnnxTaps
from colonnade.training.data import TaskData
from colonnade.training.growth import grow
from colonnade.trimming.trim import trim
from colonnade.trimming.usage import measure

SHAPE = (3, 16, 16)
TAPS = ["2", "4"]  # the second convolution ([8, 4, 4]) and the pooling ([8, 1, 1])


class _Touch:
    """Unpickling this opens (so creates) a file: visible proof that code ran."""

    def __init__(self, path: Path) -> None:
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


def _spec(tmp_path: Path, shape=SHAPE, kind: str = "linear", **lateral) -> str:
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump({
        "input": list(shape),
        "column": [{"conv2d": 4, "kernel": 3, "padding": 1}, {"act": "relu"},
                   {"conv2d": 4, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 8}],
        "lateral": {"kind": kind, **lateral}, "train": {"epochs": 1}}))
    return str(path)


def _pt2(tmp_path: Path, model: nn.Module | None = None, name: str = "m.pt2") -> Path:
    model = model or small_cnn()
    program = torch.export.export(model, (torch.zeros(2, *SHAPE),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / name)
    return tmp_path / name


def _onnx(tmp_path: Path, dynamic: bool = True) -> Path:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(small_cnn(), (torch.zeros(2, *SHAPE),), buf, dynamo=False,
                          input_names=["x"], output_names=["y"],
                          dynamic_axes={"x": {0: "n"}, "y": {0: "n"}} if dynamic else None)
    path = tmp_path / ("m.onnx" if dynamic else "fixed.onnx")
    path.write_bytes(buf.getvalue())
    return path


def _probe(tmp_path: Path, n: int = 6, classes: int = 4) -> str:
    rng = np.random.default_rng(0)
    path = tmp_path / "probe.npz"
    np.savez(path, x=rng.random((n, *SHAPE), dtype=np.float32), y=np.arange(n) % classes)
    return str(path)


def _rewrite(src: Path, dst: Path, change) -> Path:
    """Copy a zip archive member by member, letting ``change(name, data)`` edit each."""
    with zipfile.ZipFile(src) as zin, zipfile.ZipFile(dst, "w") as zout:
        for info in zin.infolist():
            zout.writestr(info, change(info.filename, zin.read(info.filename)))
    return dst


def _refused(tmp_path: Path, capsys, *argv) -> str:
    """Run the CLI expecting a refusal: exit 2, one line on stderr, no workspace."""
    ws = tmp_path / "ws"
    assert main(["adopt", *map(str, argv), "-o", str(ws)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("colonnade: error: ") and "\n" not in err, err
    assert not ws.exists()
    return err


# ----------------------------------------------------------------------------- no pickle
def test_pickled_weight_is_refused_and_runs_nothing(tmp_path, capsys):
    marker = tmp_path / "ran"
    payload = pickle.dumps(_Touch(marker))
    pickle.loads(payload)  # the payload is live: plain pickle runs it
    assert marker.exists()
    marker.unlink()

    def change(name: str, data: bytes) -> bytes:
        if name.endswith("model_weights_config.json"):
            config = json.loads(data)
            first = next(iter(config["config"]))
            config["config"][first]["use_pickle"] = True
            config["config"][first]["path_name"] = "weight_0"
            return json.dumps(config).encode()
        return payload if name.endswith("data/weights/weight_0") else data

    evil = _rewrite(_pt2(tmp_path), tmp_path / "evil.pt2", change)
    err = _refused(tmp_path, capsys, evil, "--task", "t", "--taps", "2", "--spec",
                   _spec(tmp_path), "--probe", _probe(tmp_path))
    assert "stored as a pickle" in err
    assert not marker.exists()


def test_pickled_sample_inputs_are_never_read(tmp_path):
    marker = tmp_path / "ran"
    payload = pickle.dumps(_Touch(marker))
    evil = _rewrite(_pt2(tmp_path), tmp_path / "evil.pt2",
                    lambda name, data: payload if "sample_inputs" in name else data)
    program = load_exported_program(evil.read_bytes(), str(evil))
    assert not marker.exists()
    x = torch.rand(3, *SHAPE)
    with torch.no_grad():
        assert torch.equal(program.module()(x), small_cnn()(x))
    # torch's own loader runs that payload (its weights_only fallback), which is why
    # colonnade does not call it.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            torch.export.load(evil)
        except Exception:
            pass
    assert marker.exists()


@pytest.mark.parametrize("field,value,words", [
    ("expr_str", "__import__('os').system('true')", "not a named symbol"),
    ("target", "torch.os.system", "not an ATen operator"),
    ("name", "x; import os", "not an identifier"),
    ("guards_code", ["__import__('os')"], "guard code"),
])
def test_code_in_the_program_is_refused(tmp_path, field, value, words):
    def change(name: str, data: bytes) -> bytes:
        if not name.endswith("models/model.json"):
            return data
        program = json.loads(data)
        if field == "guards_code":
            program["guards_code"] = value
        else:
            _set_first(program, field, value)
        return json.dumps(program).encode()

    evil = _rewrite(_pt2(tmp_path), tmp_path / "evil.pt2", change)
    with pytest.raises(DataError, match=words):
        load_exported_program(evil.read_bytes(), str(evil))


def _set_first(node, field: str, value) -> bool:
    if isinstance(node, dict):
        if field in node and isinstance(node[field], str):
            node[field] = value
            return True
        return any(_set_first(v, field, value) for v in node.values())
    if isinstance(node, list):
        return any(_set_first(v, field, value) for v in node)
    return False


# ----------------------------------------------------------------------------- bad input
def test_bad_inputs_are_one_sentence_and_write_nothing(tmp_path, capsys):
    spec, probe = _spec(tmp_path), _probe(tmp_path)
    pt2 = _pt2(tmp_path)
    common = ["--task", "t", "--spec", spec, "--probe", probe]
    err = _refused(tmp_path, capsys, pt2, "--taps", "conv9", *common)
    assert "no submodule named 'conv9'" in err and "nearest names" in err
    err = _refused(tmp_path, capsys, _onnx(tmp_path), "--taps", "/9/Relu", *common)
    assert "no value named" in err and "nearest names" in err
    err = _refused(tmp_path, capsys, pt2, "--taps", "2", "--task", "t", "--spec",
                   _spec(tmp_path, (3, 32, 32)), "--probe", probe)
    assert "differs from the program's sample shape" in err
    fake = tmp_path / "text.pt2"
    fake.write_text("not a zip")
    assert "not a torch.export archive" in _refused(tmp_path, capsys, fake, "--taps", "2",
                                                     *common)
    fake = tmp_path / "zip.onnx"
    fake.write_bytes(pt2.read_bytes())
    assert "not a valid ONNX model" in _refused(tmp_path, capsys, fake, "--taps", "2", *common)
    other = tmp_path / "m.h5"
    other.write_bytes(b"x")
    assert ".pt2" in _refused(tmp_path, capsys, other, "--taps", "2", *common)
    err = _refused(tmp_path, capsys, _onnx(tmp_path, dynamic=False), "--taps", "/3/Relu_output_0",
                   *common)
    assert "batch dimension is fixed" in err


def test_model_contract_refusals(tmp_path):
    spec = _spec(tmp_path)

    class FourD(nn.Module):
        def forward(self, x):
            return x

    with pytest.raises(DataError, match=r"not logits of shape \[N, classes\]"):
        colonnade.adopt(nn.Sequential(nn.Identity(), FourD()), SHAPE, "t", ["0"], spec)
    fixed = nn.Sequential(nn.Flatten(), nn.Linear(3 * 8 * 8, 4))
    with pytest.raises(DataError, match="rejects an input of sample shape"):
        colonnade.adopt(fixed, SHAPE, "t", ["0"], spec)
    with pytest.raises(SpecError, match="differs from the model's input shape"):
        colonnade.adopt(small_cnn(), (3, 8, 8), "t", TAPS, spec)
    with pytest.raises(UsageError, match="runs once"):
        relu = nn.ReLU()
        colonnade.adopt(nn.Sequential(nn.Conv2d(3, 4, 3), relu, relu, nn.AdaptiveAvgPool2d(1),
                                      nn.Flatten(), nn.Linear(4, 4)), SHAPE, "t", ["1"], spec)


class _Noisy(nn.Module):
    """A classifier whose output moves between runs: the runtime is not deterministic."""

    def __init__(self) -> None:
        super().__init__()
        self.net = small_cnn()

    def forward(self, x):
        return self.net(x) + 1e-6 * torch.rand(x.shape[0], 4)


def test_probe_that_is_not_bit_stable_is_refused(tmp_path):
    with pytest.raises(DataError, match="not deterministic with torch"):
        colonnade.adopt(_Noisy(), SHAPE, "t", ["net.2"], _spec(tmp_path),
                        probe=_probe(tmp_path))


# ----------------------------------------------------------------------------- taps
def test_onnx_taps_are_extra_outputs_only(tmp_path):
    path = _onnx(tmp_path)
    original = onnx.load(path)
    runner = OnnxTaps(path.read_bytes(), ["/3/Relu_output_0"], SHAPE)
    tapped = onnx.load_from_string(runner.tapped)
    # onnx's own protos: the same nodes and initializers, one more output.
    assert ([n.SerializeToString() for n in tapped.graph.node]
            == [n.SerializeToString() for n in original.graph.node])
    assert tapped.graph.initializer == original.graph.initializer
    assert [o.name for o in tapped.graph.output] == ["y", "/3/Relu_output_0"]
    column, alone = adopt_onnx(path.read_bytes(), SHAPE, ["/3/Relu_output_0"])
    assert column.record.tap_shapes == [[8, 4, 4]]


def test_tap_to_block_rule_and_bridges(tmp_path):
    x = torch.rand(5, *SHAPE)
    net = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, _spec(tmp_path))
    net.add_column("new", 3)
    # Blocks: 0 conv [4,16,16], 1 conv [4,8,8], 2 dense [8]; taps: [8,4,4] then [8,1,1].
    reads = {a.block: a.extra["tap_name"] for a in net.adapter_info.values() if a.column == 1}
    assert reads == {1: "2", 2: "4"}  # taps in order feed blocks 1..n
    up = net.adapters["c1_b1_from_c0"]
    assert isinstance(up.bridge, nn.Upsample)  # a 4x4 tap into an 8x8 block: upsampled
    assert net.adapter_info["h_new_from_c0"].extra["tap_name"] == "4"  # the last tap: heads
    with torch.no_grad():
        outs = net.forward_all(x)
    assert outs["new"].shape == (5, 3)

    mapped = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, _spec(tmp_path, taps={2: "2"}))
    mapped.add_column("new", 3)
    reads = {a.block: a.extra["tap_name"] for a in mapped.adapter_info.values()
             if a.column == 1}
    assert reads == {2: "2"}  # lateral.taps maps block 2 to tap "2"; block 1 reads none
    pooled = mapped.adapters["c1_b2_from_c0"].bridge  # a conv tap into a dense block
    assert isinstance(pooled[0], nn.AdaptiveAvgPool2d)

    flat = _spec(tmp_path, bridge="flatten")
    flattened = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, flat)
    flattened.add_column("new", 3)
    assert flattened.adapters["c1_b2_from_c0"].U.in_features == 8 * 1 * 1

    with pytest.raises(ColonnadeError, match="no tap 'nine'"):
        bad = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, _spec(tmp_path, taps={1: "nine"}))
        bad.add_column("new", 3)


def test_head_on_the_adopted_column(tmp_path):
    net = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, _spec(tmp_path))
    parts = net.add_head("cheap", 3)
    assert parts == ["head:cheap"]  # no adapters: a head directly on the last tap
    x = torch.rand(4, *SHAPE)
    with torch.no_grad():
        assert net(x, task="cheap").shape == (4, 3)
        assert torch.equal(net(x, task="t"), small_cnn()(x))


# ----------------------------------------------------------------------------- the rest
def _task_data(n: int = 48, classes: int = 3, seed: int = 1):
    gen = torch.Generator().manual_seed(seed)
    x = torch.rand(n, *SHAPE, generator=gen)
    y = torch.arange(n) % classes
    return TaskData(x[12:], y[12:], x[:12], y[:12], classes, "random")


def test_usage_trim_and_export_with_tap_adapters(tmp_path):
    net = colonnade.adopt(str(_pt2(tmp_path)), SHAPE, "t", TAPS, _spec(tmp_path))
    data = _task_data()
    grow(net, "new", data, mode="column", epochs=1, progress=False)
    x = torch.rand(4, *SHAPE)
    with torch.no_grad():
        before = net(x, task="t")
    colonnade.create(net.spec, tmp_path / "ws", net)
    export_task(tmp_path / "ws", "new", tmp_path / "new.onnx")  # adopted column included
    assert (tmp_path / "new.onnx").is_file()
    scored = {u.key for u in measure(net, "new", data.x, data.y, repeats=1).adapters}
    assert {"c1_b1_from_c0", "c1_b2_from_c0", "h_new_from_c0"} <= scored
    report = trim(net, "new", data, max_drop=100.0, merge=True)  # everything may go
    assert report.lateral_params_after < report.lateral_params_before
    # everything was pruned before the merge pass, so nothing was left to merge (merging
    # tap adapters is tested in tests/test_tap_merge.py)
    assert not any(a.kind == "joint" for a in net.adapter_info.values())
    with torch.no_grad():
        assert torch.equal(net(x, task="t"), before)  # the adopted task did not move


def test_adopted_column_sees_the_input_unnormalised(tmp_path):
    spec = yaml.safe_load(Path(_spec(tmp_path)).read_text())
    spec["input"] = {"shape": list(SHAPE), "normalize": {"mean": [0.5] * 3, "std": [0.25] * 3}}
    path = tmp_path / "norm.yaml"
    path.write_text(yaml.safe_dump(spec))
    x = torch.rand(3, *SHAPE)
    net = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, str(path), probe=(x, torch.zeros(3)))
    net.add_column("new", 2)
    with torch.no_grad():
        assert torch.equal(net.forward_all(x)["t"], small_cnn()(x))


@pytest.mark.parametrize("lateral", ["none", "linear", "nonlinear"])
@pytest.mark.parametrize("mode", ["column", "head"])
def test_projection_beside_an_adopted_column_equals_growing_for_real(tmp_path, lateral, mode):
    net = colonnade.adopt(small_cnn(), SHAPE, "t", TAPS, _spec(tmp_path, kind=lateral))
    net.add_column("a", 3, seed=0)
    net.freeze()
    proj = sizing.project(net, 2, mode=mode, classes=5)
    real = copy.deepcopy(net)
    x = torch.rand(1, *SHAPE)
    for p in proj.tasks:
        before = {id(q) for q in real.parameters()}
        if mode == "column":
            real.add_column(p.task, 5, seed=0)
        else:
            real.add_head(p.task, 5, on=real.column_info[-1].task, seed=0)
        real.freeze()
        # Sources: numel() of the grown modules; FlopCounterMode over the real forward.
        assert p.added.params == sum(q.numel() for q in real.parameters() if id(q) not in before)
        assert p.path.macs == flop_macs(lambda t=p.task: real(x, task=t))
        assert p.network_macs_all == flop_macs(lambda: real.forward_all(x))
        assert p.network.params == sum(q.numel() for q in real.parameters())
        assert p.activation_elements == costs.task_cost(real, p.task).path.activation_elements


def test_a_swapped_model_file_is_refused(tmp_path):
    ws = tmp_path / "ws"
    adopt_workspace(str(_pt2(tmp_path)), ws, "t", TAPS, _spec(tmp_path), _probe(tmp_path),
                    seal=True)
    changed = small_cnn()
    with torch.no_grad():
        changed[6].bias.add_(1.0)
    other = _pt2(tmp_path, changed, "other.pt2")
    # Through the API: the file's bytes replaced and the manifest record edited to match.
    net = load(ws)
    net.attachments[ADOPTED_FILE] = {"model": torch.frombuffer(bytearray(other.read_bytes()),
                                                               dtype=torch.uint8)}
    net.adopted.record.sha256 = hashlib.sha256(other.read_bytes()).hexdigest()
    net.adopted.record.file_bytes = other.stat().st_size
    save(net, ws)
    with pytest.raises(DataError, match="not the one whose SHA-256 the weights record"):
        load(ws)
