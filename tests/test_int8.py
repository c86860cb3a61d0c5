"""int8 artifacts on scikit-learn's digits: measured against float, refused when poor.

References: scikit-learn's bundled handwritten digits (permuted-pixel tasks, conftest.py)
and their labels for accuracy; onnxruntime, which runs the int8 file; onnx's parser for
the QDQ form and the bytes the file holds; ``numel()`` for the parameter count behind
the cost ledger's int8 bytes (1 B a parameter, the ledger's stated convention).
"""

from __future__ import annotations

import json

import numpy as np
import onnx
import pytest
import torch
from conftest import DIGITS_SPEC, permuted_digit_tasks, task_data

import colonnade
from colonnade.cli import main
from colonnade.evidence.artifact import DEFAULT_ACCEPT_DROP
from colonnade.files.store import create, load, read_manifest, save
from colonnade.model.spec import parse_spec
from colonnade.training.validation import store_validation


@pytest.fixture(scope="module")
def digits_ws(tmp_path_factory):
    """Two permuted-digit tasks grown, validation data kept, both sealed on their test split."""
    tmp = tmp_path_factory.mktemp("int8")
    raw = dict(DIGITS_SPEC, train=dict(DIGITS_SPEC["train"], epochs=12))
    net = colonnade.ProgressiveNet(parse_spec(raw))
    tasks = permuted_digit_tasks(2)
    for t in tasks:
        data = task_data(t)
        colonnade.grow(net, t["name"], data, progress=False)
        store_validation(net, t["name"], data.x_val, data.y_val)
    ws = tmp / "ws"
    create(parse_spec(raw), ws)
    save(net, ws)
    for t in tasks:
        np.savez(tmp / f"{t['name']}_probe.npz", x=t["x_test"], y=t["y_test"])
        assert main(["seal", str(ws), "--task", t["name"], "--probe",
                     str(tmp / f"{t['name']}_probe.npz")]) == 0
    return tmp, ws, tasks


def test_int8_loses_less_than_a_point_and_checks_exact(digits_ws, capsys):
    tmp, ws, tasks = digits_ws
    out = tmp / "digits_int8.onnx"
    capsys.readouterr()
    assert main(["export", str(ws), "--all", "-o", str(out), "--int8"]) == 0
    printed = capsys.readouterr().out
    entry = [e for e in read_manifest(ws)["history"] if e.get("step") == "artifact_exported"][-1]
    for t in tasks:
        row = entry["tasks_report"][t["name"]]
        drop = 100 * (row["workspace_accuracy"] - row["artifact_accuracy"])
        print(t["name"], row)  # the figures, for the note
        assert drop <= DEFAULT_ACCEPT_DROP, (t["name"], drop)
        assert row["agreement"] >= 0.97  # measured here: 0.99 and above
        assert row["probe"]["source"] == "seal" and row["samples"] == len(t["y_test"])
        assert any(line.startswith(t["name"] + " ") for line in printed.splitlines())
    # QDQ form, per onnx's own parser: int8 weights between Quantize/DequantizeLinear pairs
    proto = onnx.load(out)
    ops = {n.op_type for n in proto.graph.node}
    assert {"QuantizeLinear", "DequantizeLinear"} <= ops
    assert any(t.data_type == onnx.TensorProto.INT8 for t in proto.graph.initializer)
    meta = json.loads({p.key: p.value for p in proto.metadata_props}["colonnade.artifact"])
    assert meta["precision"] == "int8" and len(meta["calibration"]["sha256"]) == 64
    assert meta["calibration"]["source"].startswith("validation data kept in the workspace")
    # the size report: the ledger's int8 bytes are 1 B for each parameter (numel)
    net = load(ws)
    params = sum(p.numel() for p in net.parameters())
    assert f"int8 weight bytes {params:,} B" in printed
    assert f"file size {out.stat().st_size:,} B" in printed
    # the causes add up to the whole difference, and each is a real share of the file
    causes = entry["size"]["causes"]
    assert sum(causes.values()) == out.stat().st_size - params
    # QDQ keeps a linear layer's bias as int32: every nn.Linear bias, 3 B more than 1 B
    assert causes["biases as int32 (3 B more each)"] == 3 * sum(
        m.bias.numel() for m in net.modules() if isinstance(m, torch.nn.Linear)
        and m.bias is not None)
    # only the digits template's batch norms (100 weights + 100 biases a column) are not
    # int8 weights: folded into the dense layer before them, or kept in float after a sum
    norms = sum(p.numel() for m in net.modules() if isinstance(m, torch.nn.BatchNorm1d)
                for p in m.parameters())
    assert -norms <= causes["parameters not in int8 (norms folded or kept in float)"] < 0
    capsys.readouterr()
    assert main(["check", str(ws), "--artifact", str(out)]) == 0
    assert "checks exact" in capsys.readouterr().out


def test_poor_calibration_is_refused_unless_accepted(digits_ws, capsys):
    tmp, ws, tasks = digits_ws
    d = task_data(tasks[0])
    # A deliberately poor calibration set: one row of one class (a "7"); the ranges it
    # sets clip most other digits' activations. Measured here: 15 to 20 points lost.
    one = d.x_val[d.y_val == 7][:1].numpy()
    np.savez(tmp / "one_seven.npz", x=one)
    manifest = (ws / "manifest.yaml").read_bytes()
    out = tmp / "poor.onnx"
    capsys.readouterr()
    args = ["export", str(ws), "--all", "-o", str(out), "--int8", "--calibrate",
            str(tmp / "one_seven.npz")]
    assert main(args) == 1
    err = capsys.readouterr().err
    assert "nothing written: sealed task" in err and "accuracy points in int8" in err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not out.exists() and (ws / "manifest.yaml").read_bytes() == manifest
    assert main([*args, "--accept-drop", "100"]) == 0
    assert out.exists()


def test_calibration_digest_names_the_data(digits_ws):
    tmp, ws, tasks = digits_ws
    x = torch.from_numpy(tasks[1]["x_test"])
    np.savez(tmp / "cal.npz", x=x.numpy())
    r = colonnade.export_artifact(ws, tmp / "p1.onnx", task="perm1", int8=True,
                                  calibrate=tmp / "cal.npz")
    import hashlib
    import struct
    # the tensor record of digest.py, rebuilt here from its documented layout
    rows = np.ascontiguousarray(x.numpy(), dtype=np.float32)
    def field(b):
        return struct.pack("<Q", len(b)) + b
    record = (field(b"calibration") + field(b"torch.float32")
              + field(struct.pack(f"<{rows.ndim}Q", *rows.shape)) + field(rows.tobytes()))
    assert r["meta"]["calibration"]["sha256"] == hashlib.sha256(record).hexdigest()
    assert r["meta"]["calibration"]["samples"] == len(rows)


def test_short_names_change_no_operator_and_no_output(digits_ws):
    """The int8 file's internal names are shortened (the quantiser's long names were a
    quarter of a small model's file); onnx's protos show the same operators, attributes
    and tensors in the same order, and onnxruntime gives bit-identical outputs."""
    import onnxruntime as ort

    from colonnade.files.artifact import artifact_blob, artifact_model
    from colonnade.files.onnx_export import onnx_bytes
    from colonnade.files.quantize import short_names

    tmp, ws, tasks = digits_ws
    net = load(ws)
    blob = artifact_blob(net, net.tasks)
    data = onnx_bytes(artifact_model(blob), list(net.input_shape), blob["meta"])
    short = short_names(data)
    a, b = onnx.load_from_string(data), onnx.load_from_string(short)
    assert len(short) < len(data)
    assert [(n.op_type, n.attribute) for n in a.graph.node] == [
        (n.op_type, n.attribute) for n in b.graph.node]
    assert [t.raw_data for t in a.graph.initializer] == [t.raw_data for t in b.graph.initializer]
    assert [v.name for v in b.graph.input] == ["x"]
    assert [v.name for v in b.graph.output] == net.tasks
    assert not b.graph.value_info and all(not n.name for n in b.graph.node)
    x = tasks[0]["x_test"][:64].astype(np.float32)
    runs = [ort.InferenceSession(m, providers=["CPUExecutionProvider"]).run(None, {"x": x})
            for m in (data, short)]
    for got, want in zip(runs[1], runs[0], strict=True):
        assert np.array_equal(got, want)
