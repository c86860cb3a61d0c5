"""Shipping tasks that read an adopted column: the adopted model goes into the artifact as is.

References: onnx's own protos (every node of the adopted ONNX graph is in the composed
file, serialised byte for byte the same and in the same order) and its checker;
onnxruntime as the reference runtime (the adopted task's outputs of the composed file
against the adopted ONNX model run alone in its own onnxruntime session, same threads
and batch: bit for bit); torch's own forward of the grown network for the new tasks
(within the stated ONNX tolerance).
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
import yaml
from adopt_helpers import small_cnn

import colonnade
from colonnade.cli import main
from colonnade.evidence.artifact import ONNX_TOLERANCE
from colonnade.files.artifact import artifact_blob, artifact_meta, torch_bytes
from colonnade.files.compose import PREFIX, onnx_artifact
from colonnade.files.onnx_export import read_metadata
from colonnade.files.runtime import RUN_BATCH
from colonnade.files.standalone import load_artifact
from colonnade.files.store import create, read_manifest
from colonnade.model.exported import load_exported_program
from colonnade.training.validation import store_validation

SHAPE = (3, 16, 16)
ONNX_TAPS = ["/2/Conv_output_0", "/3/Relu_output_0"]  # the second convolution, its ReLU
MODULE_TAPS = ["2", "4"]


def _spec(tmp_path: Path) -> str:
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump({
        "input": list(SHAPE),
        "column": [{"conv2d": 4, "kernel": 3, "padding": 1}, {"act": "relu"},
                   {"conv2d": 4, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 8}],
        "lateral": {"kind": "nonlinear"}, "train": {"epochs": 1}}))
    return str(path)


def _onnx_file(tmp_path: Path, opset: int | None = None) -> Path:
    """small_cnn through torch's TorchScript-based exporter: an ONNX file made elsewhere
    (its default operator set is 20)."""
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(small_cnn(), (torch.zeros(2, *SHAPE),), buf, dynamo=False,
                          input_names=["image"], output_names=["y"], opset_version=opset,
                          dynamic_axes={"image": {0: "n"}, "y": {0: "n"}})
    path = tmp_path / "inspect.onnx"
    path.write_bytes(buf.getvalue())
    return path


def _pt2_file(tmp_path: Path) -> Path:
    program = torch.export.export(small_cnn(), (torch.zeros(2, *SHAPE),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / "inspect.pt2")
    return tmp_path / "inspect.pt2"


def _grown(model, taps, tmp_path: Path):
    """The adopted task ``t``, a column ``new`` beside it, a head ``cheap`` on its last tap."""
    net = colonnade.adopt(model, SHAPE, "t", taps, _spec(tmp_path))
    net.add_column("new", 3, seed=0)
    net.add_head("cheap", 2, on="t", seed=1)
    net.freeze()
    g = torch.Generator().manual_seed(3)
    for t in net.tasks:
        store_validation(net, t, torch.rand(70, *SHAPE, generator=g),
                         torch.randint(0, net.task(t).classes, (70,), generator=g))
    return net


def _workspace(model, taps, tmp_path: Path, seal: bool = True) -> tuple[Path, object]:
    net = _grown(model, taps, tmp_path)
    ws = tmp_path / "ws"
    create(net.spec, ws, net)
    if seal:
        probe = tmp_path / "probe.npz"
        rng = np.random.default_rng(1)
        np.savez(probe, x=rng.random((30, *SHAPE), dtype=np.float32), y=np.arange(30) % 4)
        assert main(["seal", str(ws), "--task", "t", "--probe", str(probe)]) == 0
    return ws, net


def _session(data: bytes | str) -> ort.InferenceSession:
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])


def _batched(session: ort.InferenceSession, feed: str, x: np.ndarray) -> list[np.ndarray]:
    names = [o.name for o in session.get_outputs()]
    parts = [session.run(names, {feed: x[i:i + RUN_BATCH]}) for i in range(0, len(x), RUN_BATCH)]
    return [np.concatenate(p) for p in zip(*parts, strict=True)]


def _assert_adopted_graph_unchanged(composed: onnx.ModelProto, original: onnx.ModelProto):
    """onnx's protos: the adopted nodes, in order, byte for byte; its initializers too."""
    kept = [n.SerializeToString() for n in composed.graph.node
            if not n.name.startswith(PREFIX)]
    assert kept == [n.SerializeToString() for n in original.graph.node]
    inits = {i.name: i.SerializeToString() for i in composed.graph.initializer}
    for init in original.graph.initializer:
        assert inits[init.name] == init.SerializeToString()
    onnx.checker.check_model(composed)


def test_onnx_adopted_all_tasks_compose_the_original_graph(tmp_path, capsys):
    path = _onnx_file(tmp_path)
    ws, net = _workspace(str(path), ONNX_TAPS, tmp_path)
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    capsys.readouterr()
    composed, original = onnx.load(out), onnx.load(path)
    _assert_adopted_graph_unchanged(composed, original)
    added = [n for n in composed.graph.node if n.name.startswith(PREFIX)]
    assert added and [i.name for i in composed.graph.input] == ["x"]
    assert [o.name for o in composed.graph.output] == ["t", "new", "cheap"]
    # The taps are read as the adopted graph's own values, by the new parts' nodes.
    read = {i for n in added for i in n.input}
    assert set(ONNX_TAPS) <= read

    x = np.random.default_rng(5).random((150, *SHAPE), dtype=np.float32)  # 3 batches
    got = dict(zip(["t", "new", "cheap"], _batched(_session(str(out)), "x", x), strict=True))
    alone = _batched(_session(str(path)), "image", x)[0]
    assert np.array_equal(got["t"], alone)  # bit for bit: the certified computation
    with torch.no_grad():
        want = net.forward_all(torch.from_numpy(x))
    for task in ("new", "cheap"):
        assert np.abs(got[task] - want[task].numpy()).max() <= ONNX_TOLERANCE

    meta = read_metadata(out.read_bytes())
    assert meta["adopted"]["format"] == "onnx" and meta["adopted"]["taps"] == ONNX_TAPS
    assert meta["tasks"][0]["seal"]["version"] == 1
    assert main(["check", str(ws), "--artifact", str(out)]) == 0
    assert "checks exact" in capsys.readouterr().out


def test_onnx_adopted_int8_quantises_only_the_new_parts(tmp_path, capsys):
    path = _onnx_file(tmp_path)
    ws, _ = _workspace(str(path), ONNX_TAPS, tmp_path)
    out = tmp_path / "int8.onnx"
    assert main(["export", str(ws), "--tasks", "t,new", "--int8", "-o", str(out),
                 "--accept-drop", "100"]) == 0
    capsys.readouterr()
    composed, original = onnx.load(out), onnx.load(path)
    _assert_adopted_graph_unchanged(composed, original)
    ops = {n.op_type for n in composed.graph.node if n.name.startswith(PREFIX)}
    assert {"QuantizeLinear", "DequantizeLinear"} <= ops  # the new parts are int8
    x = np.random.default_rng(6).random((64, *SHAPE), dtype=np.float32)
    got = _batched(_session(str(out)), "x", x)
    assert np.array_equal(got[0], _batched(_session(str(path)), "image", x)[0])
    assert main(["check", str(ws), "--artifact", str(out)]) == 0
    # the size report names the adopted model's float tensors (numpy's byte count of
    # onnx's initializers) among the causes, which still add up to the difference
    size = [e for e in read_manifest(ws)["history"] if e.get("step") == "artifact_exported"
            ][-1]["size"]
    adopted = sum(onnx.numpy_helper.to_array(t).nbytes for t in original.graph.initializer
                  if t.data_type == onnx.TensorProto.FLOAT)
    assert size["causes"]["the adopted ONNX model's tensors, in float as certified"] == adopted
    assert sum(size["causes"].values()) == size["difference"] == out.stat().st_size - size[
        "ledger_int8_bytes"]


def test_onnx_adopted_to_pt_is_refused_in_one_sentence(tmp_path, capsys):
    ws, _ = _workspace(str(_onnx_file(tmp_path)), ONNX_TAPS, tmp_path, seal=False)
    out = tmp_path / "new.pt"
    assert main(["export", str(ws), "--task", "new", "-o", str(out)]) != 0
    err = capsys.readouterr().err.strip()
    assert "runs in onnxruntime" in err and "FILE.onnx" in err and "\n" not in err
    assert not out.exists() and not list(tmp_path.glob(".new.pt*"))


def test_pt2_adopted_task_goes_into_the_onnx_file(tmp_path, capsys):
    ws, net = _workspace(str(_pt2_file(tmp_path)), MODULE_TAPS, tmp_path, seal=False)
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    capsys.readouterr()
    x = np.random.default_rng(7).random((20, *SHAPE), dtype=np.float32)
    got = _batched(_session(str(out)), "x", x)
    with torch.no_grad():
        want = net.forward_all(torch.from_numpy(x))
    for task, values in zip(net.tasks, got, strict=True):
        assert np.abs(values - want[task].numpy()).max() <= ONNX_TOLERANCE, task
    assert main(["check", str(ws), "--artifact", str(out)]) == 0


def test_module_adopted_column_goes_into_the_onnx_file(tmp_path):
    net = _grown(small_cnn(), MODULE_TAPS, tmp_path)
    blob = artifact_blob(net, net.tasks)
    data = onnx_artifact(net, blob, artifact_meta(net, net.tasks))
    x = np.random.default_rng(8).random((10, *SHAPE), dtype=np.float32)
    got = _batched(_session(data), "x", x)
    with torch.no_grad():
        want = net.forward_all(torch.from_numpy(x))
    for task, values in zip(net.tasks, got, strict=True):
        assert np.abs(values - want[task].numpy()).max() <= ONNX_TOLERANCE, task


def test_pt2_adopted_task_goes_into_the_pt_file_bit_identical(tmp_path, capsys):
    ws, net = _workspace(str(_pt2_file(tmp_path)), MODULE_TAPS, tmp_path, seal=False)
    out = tmp_path / "all.pt"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    capsys.readouterr()
    blob = torch.load(out, weights_only=True)  # torch's safe loader reads it whole
    # the .pt2 file ships unchanged: the bytes whose SHA-256 the adopted record holds
    assert bytes(blob["adopted_program"].numpy().tobytes()) == net.adopted.data
    with pytest.raises(ValueError, match="program_loader"):
        load_artifact(out)
    model, meta = load_artifact(out, program_loader=load_exported_program)
    assert meta["adopted"]["format"] == "pt2"
    x = torch.rand(20, *SHAPE, generator=torch.Generator().manual_seed(9))
    with torch.no_grad():
        got, want = model(x), net.forward_all(x)
    for task, values in zip(model.tasks, got, strict=True):
        assert torch.equal(values, want[task]), task  # torch's own forward, bit for bit
    assert main(["check", str(ws), "--artifact", str(out)]) == 0
    assert "checks exact" in capsys.readouterr().out


def test_module_adopted_column_goes_into_the_pt_file(tmp_path):
    net = _grown(small_cnn(), MODULE_TAPS, tmp_path)
    out = tmp_path / "all.pt"
    out.write_bytes(torch_bytes(artifact_blob(net, net.tasks, program=True)))
    model, _ = load_artifact(out, program_loader=load_exported_program)
    x = torch.rand(20, *SHAPE, generator=torch.Generator().manual_seed(10))
    with torch.no_grad():
        got, want = model(x), net.forward_all(x)
    for task, values in zip(model.tasks, got, strict=True):
        assert torch.equal(values, want[task]), task


def test_an_older_operator_set_is_kept_and_one_too_old_is_refused(tmp_path, capsys):
    path = _onnx_file(tmp_path, opset=17)  # ReduceMean's axes were an attribute before 18
    ws, net = _workspace(str(path), ONNX_TAPS, tmp_path, seal=False)
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    composed = onnx.load(out)
    assert [(o.domain, o.version) for o in composed.opset_import] == [("", 17)]
    _assert_adopted_graph_unchanged(composed, onnx.load(path))
    x = np.random.default_rng(4).random((20, *SHAPE), dtype=np.float32)
    got = _batched(_session(str(out)), "x", x)
    assert np.array_equal(got[0], _batched(_session(str(path)), "image", x)[0])
    with torch.no_grad():
        want = net.forward_all(torch.from_numpy(x))
    assert np.abs(got[1] - want["new"].numpy()).max() <= ONNX_TOLERANCE

    old = tmp_path / "old"
    old.mkdir()
    with pytest.warns(UserWarning, match="operator set 13"):  # said at adopt already
        ws13, _ = _workspace(str(_onnx_file(old, opset=13)), ONNX_TAPS, old, seal=False)
    capsys.readouterr()
    assert main(["export", str(ws13), "--all", "-o", str(old / "all.onnx")]) != 0
    err = capsys.readouterr().err.strip()
    assert "operator set 13" in err and "opset 18 or later" in err and "\n" not in err
    assert not (old / "all.onnx").exists()
