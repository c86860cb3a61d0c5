"""Shipping a workspace's tasks as one artifact, recording it, and checking it later.

References: onnxruntime (the reference ONNX runtime) and onnx's parser for .onnx files;
torch (``torch.load(weights_only=True)`` and the grown network's own ``forward_all``)
for .pt files; hashlib's SHA-256 for the file digests the history records.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from test_forward_all import CONV1D, DENSE, grown

from colonnade.app import export as app_export
from colonnade.cli import main
from colonnade.evidence.artifact import ONNX_TOLERANCE
from colonnade.files.store import create, load, read_manifest, save
from colonnade.model.spec import parse_spec
from colonnade.training.validation import store_validation


def _workspace(tmp_path, raw=CONV1D, seal=("a",)):
    """grown() as a workspace, each task with validation data, ``seal`` sealed on probes."""
    ws = tmp_path / "ws"
    net = grown(raw)
    g = torch.Generator().manual_seed(3)
    for t in net.tasks:
        store_validation(net, t, torch.randn(40, *net.input_shape, generator=g),
                         torch.randint(0, net.task(t).classes, (40,), generator=g))
    create(parse_spec(raw), ws)
    save(net, ws)
    rng = np.random.default_rng(1)
    for t in seal:
        probe = tmp_path / f"{t}_probe.npz"
        np.savez(probe, x=rng.normal(size=(30, *net.input_shape)).astype(np.float32),
                 y=rng.integers(0, net.task(t).classes, 30))
        assert main(["seal", str(ws), "--task", t, "--probe", str(probe)]) == 0
    return ws


def _exports(ws):
    return [e for e in read_manifest(ws)["history"] if e.get("step") == "artifact_exported"]


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_all_tasks_as_pt_and_onnx_recorded_and_checked_exact(tmp_path, capsys):
    ws = _workspace(tmp_path, DENSE)
    net = load(ws)
    for name in ("all.pt", "all.onnx"):
        out = tmp_path / name
        assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
        printed = capsys.readouterr().out
        for task in net.tasks:  # a line per task with its figures
            assert any(line.startswith(task + " ") for line in printed.splitlines()), task
        entry = _exports(ws)[-1]
        assert entry["sha256"] == _sha(out) and entry["file"] == name
        assert entry["tasks"] == net.tasks and entry["precision"] == "float32"
        assert entry["runtime"]["threads"] == 1 and entry["runtime"]["batch"] == 64
        assert entry["tasks_report"]["a"]["probe"]["source"] == "seal"
        assert entry["tasks_report"]["b"]["probe"]["source"] == "validation"
        assert main(["check", str(ws), "--artifact", str(out)]) == 0
        assert "checks exact" in capsys.readouterr().out
    # .pt: bit-identical to the workspace on the same threads and batch
    assert all(r["bit_identical"] for r in _exports(ws)[0]["tasks_report"].values())
    # .onnx: one named output per task; onnxruntime within the stated tolerance
    session = ort.InferenceSession(str(tmp_path / "all.onnx"), providers=["CPUExecutionProvider"])
    assert [o.name for o in session.get_outputs()] == net.tasks
    x = torch.randn(9, *net.input_shape, generator=torch.Generator().manual_seed(2))
    with torch.no_grad():
        want = net.forward_all(x)
    for task, got in zip(net.tasks, session.run(None, {"x": x.numpy()}), strict=True):
        assert np.abs(got - want[task].numpy()).max() <= 1e-5
    figures = _exports(ws)[1]["tasks_report"]
    assert all(r["max_abs_diff"] <= ONNX_TOLERANCE for r in figures.values())
    # metadata: tasks, classes, input shape, closure digests, seal versions, version
    props = {p.key: p.value for p in onnx.load(tmp_path / "all.onnx").metadata_props}
    meta = json.loads(props["colonnade.artifact"])
    assert meta["input_shape"] == [12] and meta["precision"] == "float32"
    assert [t["classes"] for t in meta["tasks"]] == [net.task(t).classes for t in net.tasks]
    seal = read_manifest(ws)["seals"]["a"][-1]
    assert meta["tasks"][0]["seal"]["version"] == 1
    assert meta["tasks"][0]["closure_sha256"] == seal["closure"]["sha256"]


def test_a_flipped_bit_is_named_and_a_foreign_file_is_not_called_tampered(tmp_path, capsys):
    ws = _workspace(tmp_path, DENSE)
    out = tmp_path / "ab.onnx"
    assert main(["export", str(ws), "--tasks", "a,b", "-o", str(out)]) == 0
    data = bytearray(out.read_bytes())
    data[len(data) - 200] ^= 0x01  # one bit, inside the weights
    out.write_bytes(bytes(data))
    capsys.readouterr()
    assert main(["check", str(ws), "--artifact", str(out)]) == 1
    printed = capsys.readouterr().out
    assert "was changed after it was exported as ab.onnx" in printed
    # a file this workspace never exported: said so, exit 2, not called tampered
    other = _workspace(tmp_path / "other", DENSE, seal=())
    foreign = tmp_path / "foreign.onnx"
    assert main(["export", str(other), "--task", "a", "-o", str(foreign)]) == 0
    capsys.readouterr()
    assert main(["check", str(ws), "--artifact", str(foreign)]) == 2
    err = capsys.readouterr().err
    assert "is not an artifact this workspace exported" in err and "changed" not in err


def test_the_old_artifact_still_checks_exact_after_two_more_tasks(tmp_path, capsys):
    ws = _workspace(tmp_path, DENSE)
    old = tmp_path / "old.onnx"
    assert main(["export", str(ws), "--tasks", "a,b", "-o", str(old)]) == 0
    first = _exports(ws)[-1]
    net = load(ws)
    net.add_column("d", 3, seed=7)
    net.add_column("e", 2, seed=8)
    net.freeze()
    save(net, ws)
    assert main(["check", str(ws), "--artifact", str(old)]) == 0
    assert "checks exact" in capsys.readouterr().out
    # a re-export of the same tasks reproduces the recorded outputs, bit for bit
    again = tmp_path / "again.onnx"
    assert main(["export", str(ws), "--tasks", "b,a", "-o", str(again)]) == 0
    second = _exports(ws)[-1]
    assert second["tasks"] == ["a", "b"]
    refs = load(ws).attachments["artifacts.safetensors"]
    for task in ("a", "b"):
        before = refs[first["tasks_report"][task]["reference"]["key"]]
        after = refs[second["tasks_report"][task]["reference"]["key"]]
        assert torch.equal(before, after), task


def test_another_runtime_version_needs_a_tolerance(tmp_path, capsys, monkeypatch):
    ws = _workspace(tmp_path, DENSE)
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    monkeypatch.setattr(app_export, "runtime_version", lambda name: "0.0.1")
    capsys.readouterr()
    assert main(["check", str(ws), "--artifact", str(out)]) == 2
    err = capsys.readouterr().err
    assert f"verified with onnxruntime {ort.__version__}, this machine has 0.0.1" in err
    assert err.count("\n") == 1
    assert main(["check", str(ws), "--artifact", str(out), "--tolerance", "1e-6"]) == 0
    assert "checked with 0.0.1" in capsys.readouterr().out


@pytest.mark.parametrize("flags, message", [
    (["--task", "a", "-o", "{tmp}/a.txt"], "must end in .pt (torch) or .onnx"),
    (["--task", "nope", "-o", "{tmp}/a.pt"], "no task named 'nope'"),
    (["--tasks", "a,nope", "-o", "{tmp}/a.onnx"], "no task named 'nope'"),
    (["--task", "a", "-o", "{tmp}/missing/a.pt"], "no such folder for the output"),
    (["--task", "a", "-o", "{tmp}/a.pt", "--int8"], "--int8 writes ONNX"),
    (["--task", "a", "-o", "{tmp}/a.onnx", "--calibrate", "{tmp}/c.npz"],
     "--calibrate applies to --int8 only"),
    (["--task", "a", "-o", "{tmp}/a.onnx", "--int8", "--calibrate", "{tmp}/wrong.npz"],
     "x has sample shape [5], but the spec's input is [12]"),
])
def test_export_bad_input_is_one_sentence(tmp_path, capsys, flags, message):
    ws = _workspace(tmp_path, DENSE, seal=())
    np.savez(tmp_path / "wrong.npz", x=np.zeros((8, 5), np.float32))
    before = sorted(p.name for p in tmp_path.iterdir())
    manifest = (ws / "manifest.yaml").read_bytes()
    args = [f.format(tmp=tmp_path) for f in flags]
    assert main(["export", str(ws), *args]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and err.count("\n") == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert (ws / "manifest.yaml").read_bytes() == manifest


def test_int8_without_any_calibration_data_is_refused(tmp_path, capsys):
    ws = tmp_path / "ws"
    create(parse_spec(DENSE), ws)
    save(grown(DENSE), ws)  # no validation data kept
    assert main(["export", str(ws), "--all", "-o", str(tmp_path / "q.onnx"), "--int8"]) == 2
    err = capsys.readouterr().err
    assert "needs calibration data" in err and "--calibrate FILE" in err
    assert not (tmp_path / "q.onnx").exists()


def test_a_retired_task_is_not_shipped(tmp_path, capsys):
    ws = _workspace(tmp_path, DENSE, seal=())
    assert main(["retire", str(ws), "--task", "b_extra", "--reason", "replaced"]) == 0
    capsys.readouterr()
    out = tmp_path / "x.pt"
    assert main(["export", str(ws), "--tasks", "a,b_extra", "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert "task 'b_extra' is retired" in err and err.count("\n") == 1 and not out.exists()
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0  # the live tasks only
    assert [t["name"] for t in torch.load(out, weights_only=True)["meta"]["tasks"]] == \
        ["a", "b", "c"]
