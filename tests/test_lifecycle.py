"""A task's lifecycle: retrained in place when nothing else reads its parts, retired out of
service with its record kept; both recorded with a reason.

Outside references: the logits themselves, bit for bit (a task that must not move), forward
hooks on the modules torch calls for ``forward_all`` with ``numel()`` (what the costs of a
network with a retired task may count), and FlopCounterMode for its MACs.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from conftest import called_tensors, flop_macs

from colonnade.app.evidence import seal_workspace, unseal_workspace
from colonnade.app.lifecycle import retire_workspace, retrain_workspace
from colonnade.app.show import describe
from colonnade.app.workspace import predict_file
from colonnade.cli import main
from colonnade.costing import costs
from colonnade.errors import SealedError, UsageError
from colonnade.evidence import transfer
from colonnade.files.store import load

SPEC = """name: life
input: [6]
column:
  - {dense: 8}
  - {act: relu}
  - {dense: 6}
  - {act: relu}
lateral: {kind: linear}
train: {epochs: 2, batch_size: 8}
"""


@pytest.fixture()
def ws(tmp_path):
    (tmp_path / "spec.yaml").write_text(SPEC)
    g = np.random.default_rng(0)
    for name in ("a", "b", "b2"):
        x = g.normal(size=(48, 6)).astype(np.float32)
        np.savez(tmp_path / f"{name}.npz", x=x, y=(x[:, 0] > 0).astype(np.int64) + (
            x[:, 1] > 0.5))
    folder = tmp_path / "ws"
    assert main(["new", str(tmp_path / "spec.yaml"), "-o", str(folder)]) == 0
    for name in ("a", "b"):
        assert main(["grow", str(folder), "--task", name, "--train",
                     str(tmp_path / f"{name}.npz"), "--quiet"]) == 0
    return folder


def _logits(folder, task, x):
    net = load(folder)
    with torch.no_grad():
        return net(x, task=task)


def test_retrain_refuses_shared_parts_and_sealed_tasks(ws, tmp_path):
    with pytest.raises(UsageError, match=r"cannot retrain task 'a' in place: task 'b' \(reads "
                                         r"column:0"):
        retrain_workspace(ws, "a", tmp_path / "a.npz", "new data")
    seal_workspace(ws, "b", tmp_path / "b.npz")
    with pytest.raises(SealedError, match="lift the seal first"):
        retrain_workspace(ws, "b", tmp_path / "b2.npz", "new data")
    with pytest.raises(UsageError, match="--reason"):
        retrain_workspace(ws, "b", tmp_path / "b2.npz", " ")


def test_retrain_after_unseal_changes_only_the_task(ws, tmp_path):
    seal_workspace(ws, "b", tmp_path / "b.npz")
    unseal_workspace(ws, "b", "the line changed")
    x = torch.randn(10, 6)
    a_before, b_before = _logits(ws, "a", x), _logits(ws, "b", x)
    step = retrain_workspace(ws, "b", tmp_path / "b2.npz", "new recordings", fresh=True,
                             progress=False)
    assert step["reason"] == "new recordings" and "column:1" in step["parts"]
    # Source: the logits, bit for bit: task a's closure was not touched.
    assert torch.equal(_logits(ws, "a", x), a_before)
    assert not torch.equal(_logits(ws, "b", x), b_before)
    net = load(ws)
    history = [e["step"] for e in net.meta["history"]]
    assert history[-2:] == ["task_retrained", "task_remeasured"]
    record = net.meta["records"]["b"]
    assert record["retrains"][0]["reason"] == "new recordings"
    R = transfer.record(net)["R"]
    assert R[-1][1] == net.meta["history"][-1]["val_accuracy"]


def test_retire_keeps_the_record_and_stops_service(ws, tmp_path, capsys):
    x = torch.randn(10, 6)
    a_before = _logits(ws, "a", x)
    assert main(["retire", str(ws), "--task", "a", "--reason", "line closed"]) == 0
    assert "parts still read by other tasks: column:0" in capsys.readouterr().out
    net = load(ws)
    assert net.live_tasks == ["b"] and "a" in net.tasks
    step = net.meta["history"][-1]
    assert step["step"] == "task_retired" and step["reason"] == "line closed"
    assert "column:0" in step["parts_still_read"] and "head:a" in step["parts_idle"]
    # its parts stay: what it computed is still there, bit for bit
    assert torch.equal(_logits(ws, "a", x), a_before)
    assert set(net.forward_all(x)) == {"b"}
    with pytest.raises(UsageError, match="retired"):
        predict_file(ws, "a", tmp_path / "a.npz", tmp_path / "p.npz")
    assert main(["export", str(ws), "--task", "a", "-o", str(tmp_path / "a.pt")]) != 0
    ledger = costs.ledger_of(net)
    assert [t.task for t in ledger.tasks] == ["b"]
    one = torch.zeros(1, 6)
    params = dict(net.named_parameters())
    used = called_tensors(net, lambda: net.forward_all(one))
    # Sources: numel() of the modules forward_all calls; FlopCounterMode.
    assert ledger.total.params.total == sum(params[k].numel() for k in used if k in params)
    assert ledger.total.macs == flop_macs(lambda: net.forward_all(one))
    shown = {t["task"]: t for t in describe(ws)["tasks"]}
    assert shown["a"]["state"] == "retired" and shown["a"]["val_accuracy"] is not None
    with pytest.raises(UsageError, match="retired"):
        retire_workspace(ws, "a", "again")


def test_retire_refuses_a_sealed_task(ws, tmp_path):
    seal_workspace(ws, "a", tmp_path / "a.npz")
    with pytest.raises(SealedError, match="cannot retire task 'a'"):
        retire_workspace(ws, "a", "closing")


def test_a_retired_task_is_not_sealed(ws, tmp_path):
    retire_workspace(ws, "b", "line closed")
    with pytest.raises(UsageError, match="retired"):
        seal_workspace(ws, "b", tmp_path / "b.npz")


def test_fresh_retrain_starts_from_new_weights(ws, tmp_path, monkeypatch):
    """With training itself taken out, ``--fresh`` must still have replaced every own
    parameter, and a plain retrain none."""
    from colonnade.training import lifecycle

    class _Record:
        epochs_run = 0

        def to_dict(self):
            return {}

    monkeypatch.setattr(lifecycle, "fit_task", lambda *a, **k: _Record())
    before = {k: v.clone() for k, v in load(ws).state_dict().items()}
    retrain_workspace(ws, "b", tmp_path / "b2.npz", "same weights", progress=False)
    after = load(ws).state_dict()
    assert all(torch.equal(after[k], v) for k, v in before.items())
    retrain_workspace(ws, "b", tmp_path / "b2.npz", "new weights", fresh=True, progress=False)
    after = load(ws).state_dict()
    own = [k for k in before if k.startswith(("heads.b.", "columns.1.", "adapters.c1_",
                                              "adapters.h_b_"))
           and before[k].is_floating_point() and "running" not in k]
    assert own and all(not torch.equal(after[k], before[k]) for k in own)
    others = [k for k in before if k.startswith(("heads.a.", "columns.0."))]
    assert all(torch.equal(after[k], before[k]) for k in others)
