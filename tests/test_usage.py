"""Adapter usage scores on scikit-learn's bundled digits.

Outside references: the UCI handwritten digits shipped in scikit-learn
(``sklearn.datasets.load_digits``), arranged so that the right answer is known by
construction: a noisy copy of the plain digits is related to the column trained on the
plain digits and unrelated to the column trained on a random pixel permutation; the
definitions of the scores (the network's own pre-activation, re-added by hand here);
the Average Perturbation Sensitivity of Rusu et al. 2016 (arXiv:1606.04671, Sec. 5) for
the noise scaled to each source feature's standard deviation; the pruning mechanism
itself (a removed adapter) for ablation; and the PNG signature (ISO/IEC 15948: the first
8 bytes of every PNG file) for the heat map.
"""

from __future__ import annotations

import copy
import functools
import json

import numpy as np
import pytest
import torch
import yaml
from conftest import DIGITS_SPEC, permuted_digit_tasks, snapshot, task_data

import colonnade
from colonnade.cli import main
from colonnade.files import store
from colonnade.model.spec import parse_spec
from colonnade.training.fit import evaluate, task_logits
from colonnade.trimming import usage


@functools.lru_cache(maxsize=1)
def _related_net():
    """perm0 (plain digits), perm1 (a permutation), then noisy0: plain digits + noise.

    noisy0 has only 300 training samples, so transfer matters: its column leans on the
    features of column 0, which saw the same images without noise.
    """
    tasks = permuted_digit_tasks(2)
    net = colonnade.ProgressiveNet(parse_spec(copy.deepcopy(DIGITS_SPEC)))
    for t in tasks:
        colonnade.grow(net, t["name"], task_data(t), progress=False)
    rng = np.random.default_rng(1)
    noisy = {"name": "noisy0", "y": tasks[0]["y"][:300], "y_test": tasks[0]["y_test"],
             "x": (tasks[0]["x"][:300] + rng.normal(0, 0.15, (300, 64))).astype(np.float32),
             "x_test": (tasks[0]["x_test"]
                        + rng.normal(0, 0.15, tasks[0]["x_test"].shape)).astype(np.float32)}
    colonnade.grow(net, "noisy0", task_data(noisy), progress=False)
    return net, noisy


def related():
    net, noisy = _related_net()
    return copy.deepcopy(net), noisy


def _xy(task):
    return torch.from_numpy(task["x_test"]), torch.from_numpy(task["y_test"])


def test_related_column_ranks_above_unrelated():
    net, noisy = related()
    report = usage.measure(net, "noisy0", *_xy(noisy))
    by = {(a.layer, a.sources[0]): a for a in report.adapters}
    assert set(by) == {("block 1", 0), ("block 1", 1), ("head", 0), ("head", 1)}
    for layer in ("block 1", "head"):
        rel, unrel = by[(layer, 0)], by[(layer, 1)]
        # Known by construction: column 0 saw these very images (without noise).
        assert rel.score > unrel.score, (layer, rel, unrel)
        assert rel.aps > unrel.aps, (layer, rel, unrel)
        assert rel.varying_share > unrel.varying_share, (layer, rel, unrel)
        # APS is normalised over the adapters into one layer.
        assert rel.aps + unrel.aps == pytest.approx(1.0)


def test_shares_match_the_pre_activation_computed_by_hand():
    net, noisy = related()
    x, y = _xy(noisy)
    report = usage.measure(net, "noisy0", x, y)
    by = {a.key: a for a in report.adapters}
    with torch.no_grad():
        outs = net.run_columns(x, [0, 1, 2])
        # Block 1 of column 2: W h + b + U_0 h_0 + U_1 h_1 (Rusu et al. 2016, Eq. 1).
        parts = {key: net.adapters[key](outs[j][0]) for key, j in
                 (("c2_b1_from_c0", 0), ("c2_b1_from_c1", 1))}
        z = net.columns[2].blocks[1].weighted(outs[2][0]) + sum(parts.values())
        head = {key: net.adapters[key](outs[j][-1]) for key, j in
                (("h_noisy0_from_c0", 0), ("h_noisy0_from_c1", 1))}
        logits = net.heads["noisy0"](outs[2][-1]) + sum(head.values())
    for group, total in ((parts, z), (head, logits)):
        total = total.double()
        centred = total - total.mean(0)
        for key, out in group.items():
            out = out.double()
            share = (out.norm(dim=1) / total.norm(dim=1)).mean().item()
            varying = ((out - out.mean(0)).norm(dim=1) / centred.norm(dim=1)).mean().item()
            assert by[key].share == pytest.approx(share, rel=1e-9, abs=1e-12)
            assert by[key].varying_share == pytest.approx(varying, rel=1e-9, abs=1e-12)
            assert 0 < by[key].share < 1


def test_ablation_equals_removing_the_adapter():
    net, noisy = related()
    x, y = _xy(noisy)
    report = usage.measure(net, "noisy0", x, y)
    base = evaluate(net, "noisy0", x, y)
    assert report.accuracy == pytest.approx(base[0])
    for a in report.adapters:
        pruned = copy.deepcopy(net)  # the pruning mechanism itself, not a hook
        pruned.adapter_info[a.key].state = "pruned"
        del pruned.adapters[a.key]
        pruned._reindex()
        acc, loss = evaluate(pruned, "noisy0", x, y)
        assert a.ablation_accuracy_drop == pytest.approx(base[0] - acc, abs=1e-12)
        assert a.ablation_loss_rise == pytest.approx(loss - base[1], rel=1e-5, abs=1e-6)


def test_measuring_changes_nothing_and_leaves_no_hooks():
    net, noisy = related()
    x, y = _xy(noisy)
    before = task_logits(net, "noisy0", x)
    state = {k: v.clone() for k, v in net.state_dict().items()}
    usage.measure(net, "noisy0", x, y)
    assert torch.equal(task_logits(net, "noisy0", x), before)  # bit for bit
    after = net.state_dict()
    assert all(torch.equal(state[k], after[k]) for k in state)
    for m in net.modules():
        assert not m._forward_hooks and not m._forward_pre_hooks


def test_perturbation_noise_follows_each_source_features_spread():
    # APS (Rusu et al. 2016) perturbs with Gaussian noise; ours is scaled per input
    # feature to its standard deviation on the data. Watch the inputs the adapter sees.
    net, noisy = related()
    x, y = _xy(noisy)
    x, y = x[:256], y[:256]  # one evaluation batch: each call sees all samples
    key = "c2_b1_from_c0"
    seen = []
    handle = net.adapters[key].register_forward_hook(
        lambda m, args, out: seen.append(args[0].detach().clone()))
    try:
        report = usage.measure(net, "noisy0", x, y, noise=0.5, repeats=2, seed=3)
    finally:
        handle.remove()
    clean = seen[0]
    moved = [h - clean for h in seen if not torch.equal(h, clean)]
    assert len(moved) == 2  # the two repeats of its own perturbation, nothing else
    std = clean.double().std(0, unbiased=False)
    live = std > 1e-3  # features that vary at all (float32 noise is ~1e-7): our cut
    for d in moved:
        ratio = d.double().std(0)[live] / std[live]
        # noise = 0.5 standard deviations by definition; 5 % is the sampling error of a
        # standard deviation over these rows (about 1/sqrt(2n), common practice), rounded up.
        assert ratio.mean().item() == pytest.approx(0.5, rel=0.05)
    again = usage.measure(net, "noisy0", x, y, noise=0.5, repeats=2, seed=3)
    assert [a.to_dict() for a in again.adapters] == [a.to_dict() for a in report.adapters]


def test_usage_verb_records_plots_and_prints_json(tmp_path, capsys):
    net, noisy = related()
    ws = tmp_path / "ws"
    ws.mkdir()
    store.save(net, ws)
    data = tmp_path / "noisy.npz"
    np.savez(data, x=noisy["x_test"], y=noisy["y_test"])
    plot = tmp_path / "use.png"
    assert main(["usage", str(ws), "--task", "noisy0", "--data", str(data), "--json",
                 "--plot", str(plot)]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert {a["key"] for a in printed["adapters"]} == {
        "c2_b1_from_c0", "c2_b1_from_c1", "h_noisy0_from_c0", "h_noisy0_from_c1"}
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    assert set(manifest["usage"]["noisy0"]["adapters"]) == {a["key"] for a in printed["adapters"]}
    back = colonnade.load(ws)
    for a in printed["adapters"]:
        assert back.adapter_info[a["key"]].extra["usage"]["score"] == pytest.approx(a["score"])
    x, _ = _xy(noisy)
    assert torch.equal(task_logits(back, "noisy0", x), task_logits(net, "noisy0", x))

    assert main(["usage", str(ws), "--task", "noisy0", "--data", str(data)]) == 0
    text = capsys.readouterr().out
    assert "c2_b1_from_c0" in text and "APS" in text


@pytest.mark.parametrize("args, words", [
    (["--task", "nope"], "no task named"),
    (["--task", "noisy0", "--plot", "{tmp}/use.gif"], ".png"),
    (["--task", "noisy0", "--plot", "{tmp}/missing/use.png"], "no such folder"),
    (["--task", "perm0"], "no live lateral adapters"),
    (["--task", "noisy0", "--data", "{tmp}/bad.npz"], "bad.npz"),
])
def test_usage_bad_input_is_one_sentence_and_writes_nothing(tmp_path, capsys, args, words):
    net, noisy = related()
    ws = tmp_path / "ws"
    ws.mkdir()
    store.save(net, ws)
    good = tmp_path / "noisy.npz"
    np.savez(good, x=noisy["x_test"], y=noisy["y_test"])
    np.savez(tmp_path / "bad.npz", x=np.zeros((5, 7), np.float32), y=np.zeros(5, np.int64))
    args = [a.replace("{tmp}", str(tmp_path)) for a in args]
    if "--data" not in args:
        args += ["--data", str(good)]
    before = snapshot(tmp_path)
    assert main(["usage", str(ws), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("colonnade: error:") and words in err and "\n" not in err
    assert snapshot(tmp_path) == before
