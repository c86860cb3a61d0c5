"""The guard: nothing writes into a sealed closure, and a refusal leaves everything as it was.

Outside references: the UCI digits bundled in scikit-learn; torch's ``requires_grad`` and
``state_dict`` as the ground truth of what is trainable and what the weights are; the
workspace bytes on disk (conftest ``snapshot``) for "unchanged".
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from conftest import permuted_digit_tasks, snapshot, task_data, write_npz
from test_seal import EPOCHS, digits_spec, write_probe

import colonnade
from colonnade.app.evidence import check_workspace
from colonnade.app.workspace import grow_workspace
from colonnade.cli import main
from colonnade.errors import SealedError, UsageError
from colonnade.evidence import seal
from colonnade.files import store
from colonnade.model import guard


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """perm0 and perm1 grown and sealed through the command line; perm2 data ready."""
    root = tmp_path_factory.mktemp("guard")
    tasks = permuted_digit_tasks(3)
    ws = root / "ws"
    store.create(digits_spec("adamw", "nonlinear"), ws)
    for t in tasks:
        write_npz(root / f"{t['name']}.npz", t)
        write_probe(root, t)
    for t in tasks[:2]:
        grow_workspace(ws, t["name"], root / f"{t['name']}.npz", epochs=EPOCHS,
                       progress=False)
        assert main(["seal", str(ws), "--task", t["name"],
                     "--probe", str(root / f"{t['name']}_probe.npz")]) == 0
    return root


@pytest.fixture
def ws(base, tmp_path):
    import shutil

    shutil.copytree(base, tmp_path / "copy")
    return tmp_path / "copy" / "ws"


def _state_bytes(net) -> dict[str, bytes]:
    from colonnade.model.digest import raw_bytes

    return {k: raw_bytes(v) for k, v in net.state_dict().items()}


@pytest.mark.parametrize("part", ["column:0", "column:1", "adapter:c1_b1_from_c0",
                                  "adapter:h_perm1_from_c0", "head:perm0", "head:perm1"])
def test_retraining_a_sealed_part_is_refused_and_nothing_changes(ws, part):
    net = store.load(ws)
    with pytest.raises(SealedError, match=r"seal v1") as info:
        net._make_trainable([part])
    assert "perm" in str(info.value) and "\n" not in str(info.value)
    assert net.trainable_parts == []
    assert not any(p.requires_grad for p in net.parameters())


def test_load_state_dict_over_a_sealed_closure_is_refused(ws):
    net = store.load(ws)
    before = _state_bytes(net)
    other = {k: v.clone() for k, v in net.state_dict().items()}
    other["columns.0.blocks.0.weighted.weight"][0, 0] += 1.0
    with pytest.raises(SealedError, match=r"columns\.0\.blocks\.0\.weighted\.weight.*'perm0'"):
        net.load_state_dict(other)
    assert _state_bytes(net) == before
    net.load_state_dict({k: v.clone() for k, v in net.state_dict().items()})  # same bits: fine


def test_saving_an_edited_sealed_tensor_is_refused_and_the_workspace_is_unchanged(ws):
    net = store.load(ws)
    files = snapshot(ws)
    with torch.no_grad():
        net.heads["perm1"].bias.add_(0.5)  # an in-memory edit that bypasses the guard
    with pytest.raises(SealedError, match=r"refusing to save.*'perm1'.*heads\.perm1\.bias"):
        store.save(net, ws)
    assert snapshot(ws) == files


def test_trimming_an_adapter_of_a_sealed_closure_is_refused(ws):
    net = store.load(ws)
    files = snapshot(ws)
    net.adapter_info["c1_b1_from_c0"].state = "pruned"  # what a prune step would record
    net._reindex()
    with pytest.raises(SealedError, match=r"c1_b1_from_c0"):
        store.save(net, ws)
    assert snapshot(ws) == files
    with pytest.raises(SealedError):
        guard.guard(net, ["adapter:c1_b1_from_c0"], "prune")


@pytest.mark.parametrize("state,action", [("pruned", "prune"), ("merged", "merge")])
def test_retiring_an_adapter_of_a_sealed_closure_is_refused_before_any_change(ws, state,
                                                                               action):
    # retire_adapters is the one place trim and merge take adapters out of the network.
    net = store.load(ws)
    before = _state_bytes(net)
    with pytest.raises(SealedError, match=rf"cannot {action} .*'perm1'"):
        net.retire_adapters(["c1_b1_from_c0"], state, action)
    assert net.adapter_info["c1_b1_from_c0"].state == "live"
    assert "c1_b1_from_c0" in net.adapters and _state_bytes(net) == before


def test_removing_a_sealed_task_is_refused(ws):
    net = store.load(ws)
    with pytest.raises(SealedError, match=r"perm1"):
        net.remove_task("perm1")
    assert net.tasks == ["perm0", "perm1"]


def test_growing_over_sealed_tasks_is_fine(ws):
    root = ws.parent
    grow_workspace(ws, "perm2", root / "perm2.npz", epochs=1, progress=False)
    grow_workspace(ws, "perm2_head", root / "perm2.npz", mode="head", on="perm1", epochs=1,
                   progress=False)
    report = check_workspace(ws)
    assert report.passed and [t.verdict for t in report.tasks] == ["exact", "exact"]


def test_unseal_is_the_way_round_and_is_recorded(ws, capsys):
    files = snapshot(ws)
    assert main(["unseal", str(ws), "--task", "perm1", "--reason", "   "]) == 2
    assert "reason" in capsys.readouterr().err
    assert snapshot(ws) == files
    assert main(["unseal", str(ws), "--task", "nope", "--reason", "x"]) == 2
    assert snapshot(ws) == files

    assert main(["unseal", str(ws), "--task", "perm1", "--reason", "retrain on new data"]) == 0
    net = store.load(ws)
    step = net.meta["history"][-1]
    assert step["step"] == "task_unsealed" and step["task"] == "perm1"
    assert step["reason"] == "retrain on new data" and step["time"]
    assert not guard.is_sealed(net, "perm1") and guard.is_sealed(net, "perm0")
    assert set(guard.sealed_tasks(net)) == {"perm0"}
    net._make_trainable(["head:perm1"])  # allowed now
    with pytest.raises(SealedError):
        net._make_trainable(["column:0"])  # still in perm0's sealed closure
    with pytest.raises(UsageError, match="not sealed"):
        seal.unseal_task(net, "perm1", "again")


def test_sealing_twice_makes_a_new_version_and_keeps_the_history(ws):
    root = ws.parent
    assert main(["seal", str(ws), "--task", "perm0", "--probe",
                 str(root / "perm0_probe.npz")]) == 2  # sealing again needs a reason
    assert main(["seal", str(ws), "--task", "perm0", "--probe",
                 str(root / "perm0_probe.npz"), "--reason", "annual review"]) == 0
    net = store.load(ws)
    versions = guard.seals_of(net, "perm0")
    assert [v["version"] for v in versions] == [1, 2]
    assert guard.latest_seal(net, "perm0")["version"] == 2
    sealed_steps = [e for e in net.meta["history"] if e["step"] == "task_sealed"]
    assert [(e["task"], e["version"]) for e in sealed_steps] == [
        ("perm0", 1), ("perm1", 1), ("perm0", 2)]
    assert {"perm0/v1", "perm0/v2", "perm1/v1"} <= set(net.attachments[seal.SEALS_FILE])
    assert [t.version for t in check_workspace(ws).tasks] == [2, 1]


@pytest.mark.parametrize("argv,needle", [
    (["seal", "{ws}", "--task", "nope", "--probe", "{root}/perm0_probe.npz"], "no task"),
    (["seal", "{ws}", "--task", "perm0", "--probe", "{root}/missing.npz"], "no such"),
    (["seal", "{ws}", "--task", "perm0", "--probe", "{root}/unlabelled.npz"], "'y'"),
    (["seal", "{ws}", "--task", "perm0", "--probe", "{root}/narrow.npz"], "shape"),
    (["check", "{ws}", "--probe", "{root}/perm0_probe.npz"], "--task"),
    (["check", "{ws}", "--task", "perm2"], "no task"),
    (["unseal", "{ws}", "--task", "perm0", "--reason", ""], "reason"),
])
def test_bad_input_gets_one_sentence_and_changes_nothing(ws, capsys, argv, needle):
    root = ws.parent
    np.savez(root / "unlabelled.npz", x=np.zeros((3, 64), np.float32))
    np.savez(root / "narrow.npz", x=np.zeros((3, 8), np.float32), y=np.zeros(3, np.int64))
    files = snapshot(ws)
    assert main([a.format(ws=ws, root=root) for a in argv]) == 2
    out, err = capsys.readouterr()
    assert needle in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert snapshot(ws) == files


def test_check_with_nothing_sealed_is_an_error(tmp_path, capsys):
    net = store.create(digits_spec(), tmp_path / "ws")
    t = permuted_digit_tasks(1)[0]
    colonnade.grow(net, t["name"], task_data(t), epochs=1, progress=False)
    store.save(net, tmp_path / "ws")
    assert main(["check", str(tmp_path / "ws")]) == 2
    assert "nothing to check" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exit_info:  # argparse rejects the flag itself
        main(["check", str(tmp_path / "ws"), "--tolerance", "-1"])
    assert exit_info.value.code == 2
    assert "--tolerance" in capsys.readouterr().err


def test_a_task_in_training_cannot_be_sealed(ws):
    net = store.load(ws)
    parts = net.add_column("perm2", 10, seed=2)  # new parts are trainable until frozen
    probe = seal.load_probe(ws.parent / "perm2_probe.npz", net, "perm2")
    with pytest.raises(UsageError, match="trainable"):
        seal.seal_task(net, "perm2", probe)
    assert not guard.seals_of(net, "perm2") and parts
    net.freeze()
    assert seal.seal_task(net, "perm2", probe)["version"] == 1
