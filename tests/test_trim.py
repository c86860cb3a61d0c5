"""Pruning, merging and auto growth on scikit-learn's bundled digits.

Outside references: the UCI handwritten digits shipped in scikit-learn
(``sklearn.datasets.load_digits``) as permuted-pixel tasks, where an earlier column
carries little for a new random permutation (Rusu et al. 2016 observed that much lateral
capacity goes unused); ``numel()`` for every parameter count; torch's own
``torch.nn.functional.conv1d`` / ``conv2d`` and matrix products for the summed adapter
outputs a merge must reproduce; the seal check (``app_evidence.check_workspace``), which
compares SHA-256 digests and probe logits byte for byte; and a head task sharing a
column, whose logits must not move by a bit.
"""

from __future__ import annotations

import copy
import functools

import numpy as np
import pytest
import torch
from conftest import (
    DIGITS_SPEC,
    called_modules,
    called_params,
    permuted_digit_tasks,
    snapshot,
    task_data,
)

import colonnade
from colonnade.app import evidence as app_evidence
from colonnade.app import trim as app_trim
from colonnade.app.evidence import check_workspace
from colonnade.app.workspace import predict_file
from colonnade.cli import main
from colonnade.costing import costs
from colonnade.errors import SealedError, UsageError
from colonnade.files import artifact, store
from colonnade.model.spec import parse_spec
from colonnade.training.data import TaskData
from colonnade.training.fit import evaluate, task_logits
from colonnade.trimming import merge
from colonnade.trimming import trim as trim_module
from colonnade.trimming.usage import task_adapters

TASKS = permuted_digit_tasks(3)


@functools.lru_cache(maxsize=1)
def _grown():
    net = colonnade.ProgressiveNet(parse_spec(copy.deepcopy(DIGITS_SPEC)))
    for t in TASKS:
        colonnade.grow(net, t["name"], task_data(t), progress=False)
    return net


def grown():
    return copy.deepcopy(_grown())


def held_out(t: dict) -> TaskData:
    x, y = torch.from_numpy(t["x_test"]), torch.from_numpy(t["y_test"])
    return TaskData(x, y, x[:0], y[:0], 10, t["name"])


def path_numel(net, task: str) -> int:
    """numel() of the parameters of the modules the task's forward calls (forward hooks)."""
    x = torch.from_numpy(TASKS[0]["x_test"][:2])
    return called_params(net, lambda: net(x, task=task))


def lateral_params(net, task: str) -> int:
    # numel of every live adapter feeding the task's column and head
    return sum(p.numel() for k, _, _ in task_adapters(net, task)
               for p in net.adapters[k].parameters())


def write_files(folder, t: dict) -> tuple[str, str]:
    train, test = folder / f"{t['name']}.npz", folder / f"{t['name']}_test.npz"
    np.savez(train, x=t["x"], y=t["y"])
    np.savez(test, x=t["x_test"], y=t["y_test"])
    return str(train), str(test)


def sealed_workspace(folder, seal_tasks=("perm0", "perm1")):
    """The three-task workspace with the named tasks sealed on their test splits."""
    ws = folder / "ws"
    ws.mkdir()
    store.save(grown(), ws)
    files = {t["name"]: write_files(folder, t) for t in TASKS}
    for name in seal_tasks:
        app_evidence.seal_workspace(ws, name, files[name][1])
    return ws, files


@pytest.fixture(scope="module")
def trimmed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("trimmed")
    ws, files = sealed_workspace(folder)
    before = colonnade.load(ws)
    train, test = files["perm2"]
    report = app_trim.trim_workspace(ws, "perm2", test, finetune=5, train=train,
                                        progress=False, reason="a smaller path")
    return ws, files, before, report


# ----------------------------------------------------------------------------- pruning
def test_trim_removes_half_the_newest_laterals_within_half_a_point(trimmed):
    ws, files, before, report = trimmed
    after = colonnade.load(ws)  # the workspace stays loadable
    x, y = torch.from_numpy(TASKS[2]["x_test"]), torch.from_numpy(TASKS[2]["y_test"])
    acc0, _ = evaluate(before, "perm2", x, y)
    acc1, _ = evaluate(after, "perm2", x, y)
    lat0, lat1 = lateral_params(before, "perm2"), lateral_params(after, "perm2")
    assert lat0 == 2 * (100 * 100) + 2 * (100 * 10)  # two dense and two head maps (numel)
    assert lat0 - lat1 >= lat0 / 2, (lat0, lat1)
    # At most 0.5 points lost: the --max-drop default the trim ran with; 1e-12 absorbs the
    # rounding of accuracies that are ratios of sample counts.
    assert acc0 - acc1 <= 0.005 + 1e-12, (acc0, acc1)
    assert report["accuracy_before"] == pytest.approx(acc0)
    assert report["accuracy_after"] == pytest.approx(acc1)
    steps = [e for e in after.meta["history"] if e["step"] == "adapter_pruned"]
    assert steps and all(e["task"] == "perm2" for e in steps)
    assert {a for e in steps for a in e["adapters"]} == {
        k for k, a in after.adapter_info.items() if a.state == "pruned"}
    assert sum(e["params_saved"] for e in steps) == lat0 - lat1


def test_every_sealed_task_still_checks_exact_after_the_trim(trimmed):
    ws, _, before, _ = trimmed
    report = check_workspace(ws)
    assert {t.task for t in report.tasks} == {"perm0", "perm1"}
    assert all(t.verdict == "exact" for t in report.tasks), [t.failures for t in report.tasks]
    after = colonnade.load(ws)
    for name in ("perm0", "perm1"):
        x = torch.from_numpy(TASKS[int(name[-1])]["x_test"])
        assert torch.equal(task_logits(after, name, x), task_logits(before, name, x))


def test_dropped_columns_leave_cost_predict_and_export(trimmed, tmp_path):
    ws, files, before, report = trimmed
    net = colonnade.load(ws)
    closure = net.closure("perm2")
    dropped = sorted(set(before.closure("perm2").columns) - set(closure.columns))
    assert dropped == report["columns_dropped"]
    assert dropped, "with every lateral gone, no earlier column should stay on the path"
    # costs: the path's parameters are the numel of what the closure now holds
    numel = path_numel(net, "perm2")
    assert numel < path_numel(before, "perm2")
    assert costs.task_cost(net, "perm2").path.params.total == numel == report["params_after"]
    # predict runs only the closure's columns (Source: forward hooks on every module)
    x = torch.from_numpy(TASKS[2]["x_test"])
    ran = called_modules(net, lambda: task_logits(net, "perm2", x))
    assert ran and not any(m.startswith(f"columns.{k}.") for k in dropped for m in ran)
    expected = task_logits(net, "perm2", x)
    out = tmp_path / "pred.npz"
    predict_file(ws, "perm2", files["perm2"][1], out)
    assert np.array_equal(np.load(out)["logits"], expected.numpy())
    # export ships the smaller path, and it computes the same logits
    blob = artifact.artifact_blob(net, ["perm2"])
    assert [c["index"] for c in blob["architecture"]["columns"]] == list(closure.columns)
    model = artifact.artifact_model(blob)
    with torch.no_grad():
        assert torch.allclose(model(x)[0], expected, atol=1e-5)


def test_target_params_stops_once_reached(tmp_path):
    net = grown()
    start = costs.task_cost(net, "perm2").path.params.total
    target = start - 1000  # one head adapter (100 x 10) is enough
    report = trim_module.trim(net, "perm2", held_out(TASKS[2]), max_drop=100.0,
                              target_params=target)
    pruned = [s for s in report.steps if s.step == "adapter_pruned"]
    assert len(pruned) == 1 and report.target_met
    assert report.params_after <= target < report.params_before == start
    # Block-level closures: with column 1's head adapter gone, column 1's last block
    # leaves the path too when only an adapter into block 1 still reads it.
    assert report.params_after == path_numel(net, "perm2") <= start - 1000


# ----------------------------------------------------------------------------- merging
def _summed_and_joint(net, task, fit, x, rank):
    """The originals' summed output (computed directly) and the joint adapter's."""
    with torch.no_grad():
        outs = net.run_columns(x, net.closure(task).columns)
        infos = [net.adapter_info[k] for k in fit.keys]
        index = -1 if infos[0].head is not None else infos[0].block - 1
        summed = sum(net.adapters[a.key](outs[a.source][index]) for a in infos)
        joint = fit.module(net, rank)(torch.cat([outs[a.source][index] for a in infos], 1))
    return summed.double(), joint.double()


@pytest.mark.parametrize("keys", [["c2_b1_from_c0", "c2_b1_from_c1"],
                                  ["h_perm2_from_c0", "h_perm2_from_c1"]])
def test_merge_at_full_rank_reproduces_the_sum_and_reports_its_error(keys):
    net = grown()
    x = torch.from_numpy(TASKS[2]["x_test"])
    fit = merge.fit_joint(net, "perm2", keys, x)
    full = fit.full_rank
    assert full == min(200, net.adapters[keys[0]].U.out_features)
    summed, joint = _summed_and_joint(net, "perm2", fit, x, full)
    # At full rank the joint map equals the sum exactly in real arithmetic; 1e-5 is float32
    # rounding over sums of ~200 products (binary32 epsilon 1.2e-7 times the terms).
    assert (joint - summed).abs().max().item() <= 1e-5
    for rank in (1, max(1, full // 4), full - 1):
        summed, joint = _summed_and_joint(net, "perm2", fit, x, rank)
        measured = ((joint - summed).norm() / summed.norm()).item()
        assert fit.error(rank) == pytest.approx(measured, abs=1e-5)  # float32, as above
        # Below full rank something is lost on these maps (Eckart-Young: the error is the
        # norm of the dropped singular values, nonzero here); 1e-4 stands clear of rounding.
        assert measured > 1e-4


CONV_SPECS = {
    "conv1d": {"input": [3, 12], "column": [{"conv1d": 4, "kernel": 3, "padding": 1},
                                            {"act": "relu"},
                                            {"conv1d": 5, "kernel": 3, "stride": 2,
                                             "padding": 1},
                                            {"act": "relu"}, {"flatten": True}]},
    "conv2d": {"input": [2, 6, 6], "column": [{"conv2d": 3, "kernel": 3, "padding": 1},
                                              {"act": "relu"},
                                              {"conv2d": 4, "kernel": 2, "stride": 2},
                                              {"act": "relu"}, {"flatten": True}]},
}


@pytest.mark.parametrize("name", sorted(CONV_SPECS))
def test_merge_of_conv_laterals_is_exact_at_full_rank(name):
    raw = dict(CONV_SPECS[name], lateral={"kind": "linear"})
    net = colonnade.ProgressiveNet(parse_spec(raw))
    for i in range(3):  # untrained columns: random maps are as good a check as any
        net.add_column(f"t{i}", 3, seed=i)
    net.freeze()
    x = torch.randn(70, *net.input_shape, generator=torch.Generator().manual_seed(0))
    fit = merge.fit_joint(net, "t2", ["c2_b1_from_c0", "c2_b1_from_c1"], x)
    summed, joint = _summed_and_joint(net, "t2", fit, x, fit.full_rank)
    assert (joint - summed).abs().max().item() <= 1e-5  # float32 rounding, as above
    summed, joint = _summed_and_joint(net, "t2", fit, x, 2)
    measured = ((joint - summed).norm() / summed.norm()).item()
    assert fit.error(2) == pytest.approx(measured, abs=1e-5)


def test_nonlinear_merge_reports_the_error_it_has():
    raw = copy.deepcopy(DIGITS_SPEC)
    raw["lateral"] = {"kind": "nonlinear", "reduce": 0.5}
    net = colonnade.ProgressiveNet(parse_spec(raw))
    for i in range(3):
        net.add_column(f"t{i}", 10, seed=i)
    net.freeze()
    x = torch.from_numpy(TASKS[0]["x_test"])
    fit = merge.fit_joint(net, "t2", ["c2_b1_from_c0", "c2_b1_from_c1"], x)
    for rank in (3, fit.full_rank):
        summed, joint = _summed_and_joint(net, "t2", fit, x, rank)
        measured = ((joint - summed).norm() / summed.norm()).item()
        assert fit.error(rank) == pytest.approx(measured, abs=1e-5)
    # A relu between V and U: no linear map is exact, so the error stays clearly above
    # float32 rounding (1e-3: our margin, measured here at several times that).
    assert fit.error(fit.full_rank) > 1e-3


def test_trim_merge_is_accepted_within_tolerance_and_reloads(tmp_path):
    ws, files = sealed_workspace(tmp_path, ())
    train, test = files["perm2"]
    before = colonnade.load(ws)
    report = app_trim.trim_workspace(ws, "perm2", test, merge=True, progress=False,
                                        reason="a smaller path")
    merged = [s for s in report["steps"] if s["step"] == "adapters_merged"]
    assert merged, report
    x, y = torch.from_numpy(TASKS[2]["x_test"]), torch.from_numpy(TASKS[2]["y_test"])
    back = colonnade.load(ws)
    # The --max-drop default (0.5 points) the trim ran with.
    assert evaluate(before, "perm2", x, y)[0] - evaluate(back, "perm2", x, y)[0] <= 0.005
    for step in merged:
        key = step["detail"]["into"]
        info = back.adapter_info[key]
        assert info.kind == "joint" and info.state == "live"
        assert list(back.adapter_sources(key)) == step["detail"]["sources"]
        assert all(back.adapter_info[k].state == "merged" for k in step["adapters"])
        assert step["detail"]["rank"] < step["detail"]["full_rank"]
        assert step["params_saved"] > 0
        assert step["params_saved"] == sum(
            p.numel() for k in step["adapters"] for p in before.adapters[k].parameters()
        ) - sum(p.numel() for p in back.adapters[key].parameters())
    assert any(e["step"] == "adapters_merged" for e in back.meta["history"])
    # reloaded bit for bit: the joint adapter is rebuilt from the manifest
    again = colonnade.load(ws)
    assert torch.equal(task_logits(again, "perm2", x), task_logits(back, "perm2", x))
    # and a standalone export computes the same logits through its joint adapter
    model = artifact.artifact_model(artifact.artifact_blob(back, ["perm2"]))
    with torch.no_grad():
        assert torch.allclose(model(x)[0], task_logits(back, "perm2", x), atol=1e-5)


# ----------------------------------------------------------------------------- trust
@pytest.mark.parametrize("extra", [[], ["--merge"]])
def test_trim_on_a_sealed_task_is_refused_and_changes_nothing(tmp_path, capsys, extra):
    ws, files = sealed_workspace(tmp_path, ("perm2",))
    before = snapshot(tmp_path)
    assert main(["trim", str(ws), "--task", "perm2", "--data", files["perm2"][1],
                 *extra]) == 2
    err = capsys.readouterr().err.strip()
    assert "sealed" in err and "unseal" in err and "\n" not in err
    assert snapshot(tmp_path) == before
    with pytest.raises(SealedError):
        trim_module.trim(colonnade.load(ws), "perm2", held_out(TASKS[2]))


def test_adapters_another_task_reaches_are_kept(tmp_path):
    net = grown()
    colonnade.grow(net, "head_on_2", task_data(TASKS[2]), mode="head", on="perm2",
                   epochs=3, progress=False)
    x = torch.from_numpy(TASKS[2]["x_test"])
    other = task_logits(net, "head_on_2", x)
    with pytest.raises(UsageError, match="depends on it"):
        trim_module.trim(net, "perm2", held_out(TASKS[2]), finetune=1,
                         train=task_data(TASKS[2]))
    report = trim_module.trim(net, "perm2", held_out(TASKS[2]), max_drop=100.0)
    assert set(report.kept) == {"c2_b1_from_c0", "c2_b1_from_c1"}
    removed = {a for s in report.steps for a in s.adapters}
    assert removed and removed <= {"h_perm2_from_c0", "h_perm2_from_c1"}
    assert torch.equal(task_logits(net, "head_on_2", x), other)  # not a bit moved


def test_an_interrupted_trim_leaves_workspace_and_network_as_they_were(tmp_path, monkeypatch):
    ws, files = sealed_workspace(tmp_path, ("perm0",))
    train, test = files["perm2"]
    before = snapshot(tmp_path)
    real = trim_module.evaluate
    calls = {"n": 0}

    def flaky(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 4:  # after a removal has been accepted
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(trim_module, "evaluate", flaky)
    with pytest.raises(KeyboardInterrupt):
        app_trim.trim_workspace(ws, "perm2", test, finetune=2, train=train, merge=True,
                                   progress=False, reason="a smaller path")
    assert snapshot(tmp_path) == before

    net = colonnade.load(ws)
    x = torch.from_numpy(TASKS[2]["x_test"])
    logits = task_logits(net, "perm2", x)
    state = {k: v.clone() for k, v in net.state_dict().items()}
    infos = copy.deepcopy(net.adapter_info)
    meta = copy.deepcopy(net.meta)
    calls["n"] = 0
    with pytest.raises(KeyboardInterrupt):
        trim_module.trim(net, "perm2", held_out(TASKS[2]), max_drop=100.0)
    assert net.adapter_info == infos and net.meta == meta
    now = net.state_dict()
    assert list(now) == list(state) and all(torch.equal(now[k], state[k]) for k in state)
    assert torch.equal(task_logits(net, "perm2", x), logits)


@pytest.mark.parametrize("args, words", [
    (["--max-drop", "-1"], "max-drop"),
    (["--target-params", "5", "--target-macs", "5"], "not allowed with"),
    (["--finetune", "2"], "--train"),
    (["--train", "{train}"], "--finetune"),
    (["--task", "nope"], "no task named"),
    (["--task", "perm0"], "nothing to trim"),
])
def test_trim_bad_input_is_one_sentence_and_writes_nothing(tmp_path, capsys, args, words):
    ws, files = sealed_workspace(tmp_path, ())
    before = snapshot(tmp_path)
    argv = ["trim", str(ws), "--data", files["perm2"][1], "--reason", "a smaller path"]
    args = [a.replace("{train}", files["perm2"][0]) for a in args]
    argv += args if "--task" in args else ["--task", "perm2", *args]
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse refuses the flag itself
        code = exc.code
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert words in err
    assert snapshot(tmp_path) == before


# ----------------------------------------------------------------------------- auto growth
def test_auto_growth_takes_a_head_only_where_a_frozen_column_separates_the_task():
    net = colonnade.ProgressiveNet(parse_spec(copy.deepcopy(DIGITS_SPEC)))
    colonnade.grow(net, "perm0", task_data(TASKS[0]), progress=False)
    base = copy.deepcopy(net)
    # The same images with the classes renamed: column 0 separates them already.
    relabel = dict(TASKS[0], name="relabel", y=(TASKS[0]["y"] + 3) % 10)
    # Target 0.95: below the ~96.5 % one column reaches on these digits (test_digits,
    # measured here), above what a head on an unrelated permutation reaches.
    entry = colonnade.grow(net, "relabel", task_data(relabel), mode="auto", target=0.95,
                           progress=False)
    assert entry["step"] == "head_added" and entry["auto"]["chose"] == "head"
    assert entry["auto"]["head_val_accuracy"] >= 0.95
    assert net.task("relabel").mode == "head" and len(net.columns) == 1
    # A new pixel permutation: a head on column 0 falls short, so a column is grown.
    entry = colonnade.grow(net, "perm1", task_data(TASKS[1]), mode="auto", target=0.95,
                           progress=False)
    assert entry["step"] == "column_added" and entry["auto"]["chose"] == "column"
    assert entry["auto"]["head_val_accuracy"] < 0.95 and "rolled back" in entry["auto"]["reason"]
    assert [e["task"] for e in net.meta["history"] if "task" in e] == ["perm0", "relabel",
                                                                        "perm1"]
    assert net.meta["history"][-1] == entry and net.task("perm1").mode == "column"
    # The rollback leaves no trace: the column equals one grown directly.
    direct = base
    colonnade.grow(direct, "relabel", task_data(relabel), mode="head", progress=False)
    colonnade.grow(direct, "perm1", task_data(TASKS[1]), mode="column", progress=False)
    x = torch.from_numpy(TASKS[1]["x_test"])
    assert torch.equal(task_logits(net, "perm1", x), task_logits(direct, "perm1", x))


def test_auto_growth_needs_a_target():
    net = colonnade.ProgressiveNet(parse_spec(copy.deepcopy(DIGITS_SPEC)))
    with pytest.raises(UsageError, match="--target"):
        colonnade.grow(net, "perm0", task_data(TASKS[0]), mode="auto", progress=False)
    with pytest.raises(UsageError, match="--mode auto"):
        colonnade.grow(net, "perm0", task_data(TASKS[0]), target=0.9, progress=False)
    assert not net.tasks
