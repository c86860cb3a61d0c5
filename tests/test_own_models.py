"""Models of the user's own making, as a user builds them: what adopt takes and refuses.

Each model is built here in torch and saved the way a user would (``torch.onnx.export``
at a chosen operator set, ``torch.export.save``), or written with onnx's own helper where
a file must hold something torch would not write. References, each named beside its
check: onnxruntime (the adopted model run alone in its own session, bit for bit; the
exported file against the workspace within the stated ONNX tolerance); torch's
``FlopCounterMode`` for MACs; Python's ``zipfile``/``torch.save`` for the files that are
not programs. Every refusal is one sentence, exit 2, and no workspace folder.
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
import torch.nn as nn
import yaml
from conftest import flop_macs
from onnx import TensorProto, helper

import colonnade
import colonnade.app.adopt as adopt_app
import colonnade.files.store as store
from colonnade.cli import main
from colonnade.costing.adopted import adopted_cost
from colonnade.errors import DataError, UsageError
from colonnade.evidence.artifact import ONNX_TOLERANCE
from colonnade.files.store import create, load

SIGNAL = (2, 64)  # a two-channel vibration signal of 64 samples
IMAGE = (3, 8, 8)


class Signal(nn.Module):
    """A 1-D signal classifier with batch norm (running statistics set, as if trained)."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.c1, self.bn = nn.Conv1d(2, 4, 5, stride=2, padding=2), nn.BatchNorm1d(4)
        self.relu, self.c2, self.relu2 = nn.ReLU(), nn.Conv1d(4, 8, 5, stride=2, padding=2), nn.ReLU()
        self.pool, self.fc = nn.AdaptiveAvgPool1d(1), nn.Linear(8, 3)
        self.bn.running_mean.uniform_(-0.5, 0.5)
        self.bn.running_var.uniform_(0.5, 2.0)
        self.eval()

    def forward(self, x):
        return self.fc(self.pool(self.relu2(self.c2(self.relu(self.bn(self.c1(x)))))).flatten(1))


class Reshaping(nn.Module):
    """Flattens with ``h.reshape(h.shape[0], -1)``: its ONNX graph computes the target
    shape from the input's Shape, which onnx's shape inference cannot resolve."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(1)
        self.conv, self.fc = nn.Conv2d(3, 4, 3, stride=2, padding=1), nn.Linear(64, 3)
        self.eval()

    def forward(self, x):
        h = torch.relu(self.conv(x))
        return self.fc(h.reshape(h.shape[0], -1))


class TwoHeads(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(2)
        self.body, self.a, self.b = nn.Linear(12, 16), nn.Linear(16, 3), nn.Linear(16, 2)
        self.eval()

    def forward(self, x):
        h = torch.relu(self.body(x))
        return self.a(h), self.b(h)


def _onnx(tmp_path: Path, model: nn.Module, shape, opset: int, name: str,
          outputs=("scores",)) -> Path:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(model, (torch.zeros(2, *shape),), buf, dynamo=False,
                          input_names=["signal in"], output_names=list(outputs),
                          opset_version=opset, dynamic_axes={"signal in": {0: "n"}})
    path = tmp_path / name
    path.write_bytes(buf.getvalue())
    return path


def _spec(tmp_path: Path, shape) -> Path:
    column = ([{"conv1d": 4, "kernel": 5, "stride": 2, "padding": 2}, {"act": "relu"},
               {"pool": "global_avg"}] if len(shape) == 2 else
              [{"conv2d": 4, "kernel": 3, "padding": 1}, {"act": "relu"},
               {"pool": "global_avg"}] if len(shape) == 3 else [{"dense": 8}, {"act": "relu"}])
    path = tmp_path / f"spec{len(shape)}.yaml"
    path.write_text(yaml.safe_dump({
        "input": list(shape), "column": column + [{"dense": 8}, {"act": "relu"}],
        "lateral": {"kind": "linear"}, "train": {"epochs": 1, "batch_size": 16}}))
    return path


def _data(tmp_path: Path, shape, n: int = 20, name: str = "probe.npz") -> Path:
    rng = np.random.default_rng(0)
    path = tmp_path / name
    np.savez(path, x=rng.random((n, *shape), dtype=np.float32), y=np.arange(n) % 3)
    return path


def _adopt(tmp_path: Path, model: Path, taps: str, shape) -> tuple[int, Path]:
    ws = tmp_path / "ws"
    code = main(["adopt", str(model), "-o", str(ws), "--task", "t", "--taps", taps,
                 "--spec", str(_spec(tmp_path, shape)), "--probe", str(_data(tmp_path, shape))])
    return code, ws


def _refused(tmp_path: Path, capsys, model: Path, taps: str, shape=(12,)) -> str:
    code, ws = _adopt(tmp_path, model, taps, shape)
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.startswith("colonnade: error: ") and "\n" not in err, err
    assert not ws.exists()
    return err


def _session(data: bytes) -> ort.InferenceSession:
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])


# ----------------------------------------------------------------------------- it works
def test_a_signal_model_at_opset_17_adopts_grows_and_ships(tmp_path, capsys):
    model = _onnx(tmp_path, Signal(), SIGNAL, 17, "signal.onnx")
    code, ws = _adopt(tmp_path, model, "/relu/Relu_output_0", SIGNAL)
    assert code == 0, capsys.readouterr().err
    train = _data(tmp_path, SIGNAL, 40, "train.npz")
    assert main(["grow", str(ws), "--task", "new", "--train", str(train), "--quiet"]) == 0
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    x = np.load(_data(tmp_path, SIGNAL))["x"]
    got = _session(out.read_bytes()).run(["t", "new"], {"x": x})
    alone = _session(model.read_bytes()).run(["scores"], {"signal in": x})[0]
    assert np.array_equal(got[0], alone)  # onnxruntime, the adopted model alone: bit for bit
    with torch.no_grad():
        want = load(ws)(torch.from_numpy(x), task="new").numpy()
    assert np.abs(got[1] - want).max() <= ONNX_TOLERANCE
    assert onnx.load(out).opset_import[0].version == 17  # kept as the adopted model's


def test_a_shape_computed_reshape_adopts_and_costs_what_torch_counts(tmp_path, capsys):
    torch_model = Reshaping()
    model = _onnx(tmp_path, torch_model, IMAGE, 18, "reshape.onnx")
    # Before: onnx_graph_macs met the Reshape's unknown shape (KeyError), and the commit's
    # own clean-up then hid it behind "not a workspace (no manifest.yaml)".
    code, ws = _adopt(tmp_path, model, "/Relu_output_0,/Reshape_output_0", IMAGE)
    assert code == 0, capsys.readouterr().err
    cost = adopted_cost(load(ws).adopted)
    assert cost.macs == flop_macs(torch_model, torch.zeros(1, *IMAGE))  # FlopCounterMode


def test_a_failure_before_the_first_commit_is_reported_as_itself(tmp_path, monkeypatch):
    def broken(*_args):
        raise DataError("the real reason")

    monkeypatch.setattr(store, "_manifest_of", broken)
    spec = yaml.safe_load(_spec(tmp_path, (12,)).read_text())
    with pytest.raises(DataError, match="the real reason"):  # was: WorkspaceError
        create(spec, tmp_path / "ws")
    assert not (tmp_path / "ws").exists()


def test_two_outputs_onnx_names_the_one_it_reads_and_a_program_is_refused(tmp_path, capsys):
    model = _onnx(tmp_path, TwoHeads(), (12,), 18, "two.onnx", outputs=("a", "b"))
    code, _ = _adopt(tmp_path, model, "/body/Gemm_output_0", (12,))
    assert code == 0
    assert "logits: the model's first output 'a'; its other outputs ('b') are not read" \
        in capsys.readouterr().out
    program = torch.export.export(TwoHeads(), (torch.zeros(2, 12),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    (tmp_path / "pt2").mkdir()
    torch.export.save(program, tmp_path / "pt2" / "two.pt2")
    err = _refused(tmp_path / "pt2", capsys, tmp_path / "pt2" / "two.pt2", "body")
    assert "returns 2 outputs (a tuple)" in err


# ----------------------------------------------------------------------------- refused
def _graph_model(tmp_path: Path, name: str, nodes, elem=TensorProto.FLOAT, opset: int = 18,
                 domains=()) -> Path:
    x = helper.make_tensor_value_info("x", elem, ["n", 12])
    y = helper.make_tensor_value_info("y", elem, ["n", 3])
    w = helper.make_tensor("W", elem, [3, 12], np.ones(36))
    model = helper.make_model(helper.make_graph(nodes, "g", [x], [y], [w]), opset_imports=[
        helper.make_opsetid("", opset), *[helper.make_opsetid(d, 1) for d in domains]])
    onnx.save(model, tmp_path / name)
    return tmp_path / name


def test_onnx_models_onnxruntime_cannot_run_are_one_sentence(tmp_path, capsys):
    gemm = helper.make_node("Gemm", ["x", "W"], ["h"], transB=1)
    custom = _graph_model(tmp_path, "custom.onnx", [gemm, helper.make_node(
        "Frobnicate", ["h"], ["y"], domain="com.example")], domains=["com.example"])
    err = _refused(tmp_path, capsys, custom, "h")  # was: onnxruntime's traceback
    assert "onnxruntime" in err and "Frobnicate" in err
    relu = helper.make_node("Relu", ["h"], ["y"])
    future = _graph_model(tmp_path, "future.onnx", [gemm, relu], opset=99)
    assert "cannot run this model" in _refused(tmp_path, capsys, future, "h")
    double = _graph_model(tmp_path, "double.onnx", [gemm, relu], elem=TensorProto.DOUBLE)
    assert "holds double values" in _refused(tmp_path, capsys, double, "h")
    reshaping = _onnx(tmp_path, Reshaping(), IMAGE, 18, "reshape.onnx")
    err = _refused(tmp_path, capsys, reshaping, "/Shape_output_0", IMAGE)
    assert "tap '/Shape_output_0' holds int64 values" in err
    apart = onnx.load(_onnx(tmp_path, TwoHeads(), (12,), 18, "m.onnx", outputs=("a", "b")))
    onnx.save(apart, tmp_path / "apart.onnx", save_as_external_data=True,
              location="apart.data", size_threshold=0)
    err = _refused(tmp_path, capsys, tmp_path / "apart.onnx", "/body/Gemm_output_0")
    assert "external data" in err


def test_files_that_are_not_programs_are_refused(tmp_path, capsys):
    torch.save(TwoHeads().state_dict(), tmp_path / "weights.pt2")  # a zip holding a pickle
    err = _refused(tmp_path, capsys, tmp_path / "weights.pt2", "body")
    assert "not a torch.export program" in err and "torch.save" in err


def test_model_files_beyond_the_limits_are_refused_unread(tmp_path, capsys, monkeypatch):
    huge = tmp_path / "huge.onnx"
    with open(huge, "wb") as f:
        f.truncate(3 << 30)  # sparse: 3 GiB on paper, nothing on disk
    assert "larger than the 2 GiB" in _refused(tmp_path, capsys, huge, "h")
    program = torch.export.export(TwoHeads(), (torch.zeros(2, 12),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / "m.pt2")
    monkeypatch.setattr(adopt_app, "tensor_budget", lambda: 1000)
    assert "more than half of this machine's memory" in _refused(
        tmp_path, capsys, tmp_path / "m.pt2", "body")
    with pytest.raises(DataError, match="more than half"):  # the Python API too
        colonnade.adopt(str(tmp_path / "m.pt2"), (12,), "t", ["body"], str(_spec(tmp_path, (12,))))



def test_a_program_exported_with_a_fixed_batch_is_refused_saying_how(tmp_path, capsys):
    program = torch.export.export(TwoHeads().body, (torch.zeros(1, 12),))  # torch's default
    torch.export.save(program, tmp_path / "fixed.pt2")
    # before: "rejects an input of sample shape [12] (RuntimeError)", a shape that was right
    err = _refused(tmp_path, capsys, tmp_path / "fixed.pt2", "body")
    assert "batch dimension is fixed at 1" in err and "Dim('batch')" in err


def test_initializers_listed_as_inputs_adopt_without_onnxruntime_noise(tmp_path, capfd):
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(Signal(), (torch.zeros(2, *SIGNAL),), buf, dynamo=False,
                          input_names=["x"], output_names=["y"], opset_version=18,
                          dynamic_axes={"x": {0: "n"}}, keep_initializers_as_inputs=True)
    model = tmp_path / "old_style.onnx"
    model.write_bytes(buf.getvalue())
    assert len(onnx.load(model).graph.input) > 1  # the weights are graph inputs too
    capfd.readouterr()
    code, _ = _adopt(tmp_path, model, "/relu/Relu_output_0", SIGNAL)
    # before: onnxruntime's C++ log wrote one warning per initializer to stderr (fd 2)
    assert code == 0 and capfd.readouterr().err == ""


class Recurrent(nn.Module):
    """A GRU over a signal's time steps: the GRU module's output is a tuple."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(3)
        self.gru, self.fc = nn.GRU(2, 8, batch_first=True), nn.Linear(8, 3)
        self.eval()

    def forward(self, x):
        return self.fc(self.gru(x.transpose(1, 2))[0][:, -1])


def test_a_tap_whose_output_is_a_tuple_is_named_as_such(tmp_path):
    spec = str(_spec(tmp_path, SIGNAL))
    # before: "tap 'gru' ran a tensor in one forward pass, not once with one tensor"
    with pytest.raises(UsageError, match=r"tap 'gru' gives a tuple, not one tensor"):
        colonnade.adopt(Recurrent(), SIGNAL, "t", ["gru"], spec)
    net = colonnade.adopt(Recurrent(), SIGNAL, "t", ["fc"], spec)  # a tensor tap is fine
    assert net.adopted.record.tap_shapes == [[3]]


def test_an_old_operator_set_is_warned_about_when_adopted_not_first_at_export(tmp_path,
                                                                             capsys):
    for opset, warned in ((13, True), (18, False)):
        folder = tmp_path / str(opset)
        folder.mkdir()
        model = _onnx(folder, TwoHeads(), (12,), opset, "m.onnx", outputs=("a", "b"))
        assert onnx.load(model).opset_import[0].version == opset  # onnx's own reading
        code, _ = _adopt(folder, model, "/body/Gemm_output_0", (12,))
        err = capsys.readouterr().err
        # before: silent here; the refusal came at export, after growing and sealing
        assert code == 0 and ("uses ONNX operator set 13" in err) == warned, err


def test_models_exported_in_training_mode_are_refused(tmp_path, capsys):
    batch = {0: torch.export.Dim("batch")}
    for name, layer in (("bn", nn.BatchNorm1d(16)), ("drop", nn.Dropout(0.5))):
        model = nn.Sequential(nn.Linear(12, 16), layer, nn.ReLU(), nn.Linear(16, 3))
        folder = tmp_path / name
        folder.mkdir()
        torch.export.save(torch.export.export(model.train(), (torch.rand(4, 12),),
                                              dynamic_shapes=(batch,)), folder / "m.pt2")
        # before: adopted and proven (a batch's own statistics are the same twice), so a
        # row's logits depended on its batch; dropout was only caught as non-determinism
        err = _refused(folder, capsys, folder / "m.pt2", "0")
        assert "exported in training mode" in err and "model.eval()" in err, err
        torch.export.save(torch.export.export(model.eval(), (torch.rand(4, 12),),
                                              dynamic_shapes=(batch,)), folder / "m.pt2")
        assert _adopt(folder, folder / "m.pt2", "0", (12,))[0] == 0  # the same, in eval mode
    normalising = nn.Sequential(nn.Linear(12, 16), nn.BatchNorm1d(16), nn.Linear(16, 3))
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(normalising.train(), (torch.rand(4, 12),), buf, dynamo=False,
                          training=torch.onnx.TrainingMode.TRAINING, do_constant_folding=False,
                          input_names=["x"], dynamic_axes={"x": {0: "n"}}, opset_version=18)
    x = np.random.default_rng(0).random((8, 12), dtype=np.float32)
    session = _session(buf.getvalue())  # onnxruntime: a row's output depends on its batch
    assert not np.allclose(session.run(None, {"x": x})[0][:4], session.run(None, {"x": x[:4]})[0])
    (tmp_path / "onnx").mkdir()
    (tmp_path / "onnx" / "m.onnx").write_bytes(buf.getvalue())
    # before: adopted and proven on one batching
    err = _refused(tmp_path / "onnx", capsys, tmp_path / "onnx" / "m.onnx", "/0/Gemm_output_0")
    assert "exported in training mode (BatchNormalization" in err
