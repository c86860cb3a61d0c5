"""forward_all computes each column once and gives every task's logits bit for bit.

References: each task's own forward (``torch.equal``), and for a dense network a plain
re-computation with torch.nn.functional from the state dict, written here apart from
network.py. Trimming uses the shared mechanisms: an adapter's state set to 'pruned', the
module deleted, ``_reindex()``; and merge.py's joint adapter replacing the adapters into
one layer.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from colonnade.cli import main
from colonnade.files.store import create, save
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.fit import all_task_logits, task_logits

DENSE = {"input": [12],
         "column": [{"dense": 16}, {"norm": "batch"}, {"act": "relu"}, {"dropout": 0.2},
                    {"dense": 10}, {"act": "tanh"}],
         "lateral": {"kind": "linear"}}
CONV1D = {"input": [2, 24],
          "column": [{"conv1d": 6, "kernel": 3, "padding": 1}, {"norm": "batch"},
                     {"act": "relu"}, {"pool": "max", "size": 2},
                     {"conv1d": 8, "kernel": 3, "stride": 2}, {"act": "gelu"},
                     {"pool": "global_avg"}, {"dense": 8}, {"act": "relu"}],
          "lateral": {"kind": "nonlinear", "reduce": 0.5}}
CONV2D = {"input": [1, 8, 8],
          "column": [{"conv2d": 4, "kernel": 3, "padding": 1}, {"norm": "layer"},
                     {"act": "relu"}, {"pool": "avg", "size": 2}, {"conv2d": 6, "kernel": 3},
                     {"act": "relu"}, {"flatten": True}, {"dense": 7}],
          "lateral": {"kind": "linear"}}
SPECS = {"dense": DENSE, "conv1d": CONV1D, "conv2d": CONV2D}


def grown(raw: dict, seed: int = 0) -> ProgressiveNet:
    """Three columns (one half width) and a head, with non-trivial norm statistics."""
    torch.manual_seed(seed)
    net = ProgressiveNet(parse_spec(raw))
    net.add_column("a", 3, seed=1)
    net.add_column("b", 4, width=0.5, seed=2)
    net.add_head("b_extra", 2, on="b", seed=3)
    net.add_column("c", 5, seed=4)
    with torch.no_grad():
        for m in net.modules():
            if isinstance(m, (torch.nn.BatchNorm1d, torch.nn.BatchNorm2d)):
                m.running_mean.uniform_(-0.5, 0.5)
                m.running_var.uniform_(0.5, 2.0)
    net.freeze()
    return net


def prune(net: ProgressiveNet, keys: list[str]) -> None:
    for key in keys:
        net.adapter_info[key].state = "pruned"
        del net.adapters[key]
    net._reindex()


def trimmed(raw: dict) -> ProgressiveNet:
    """Column 2 no longer reads column 1, so task c's closure is columns 0 and 2."""
    net = grown(raw)
    prune(net, [k for k in net.adapter_info if k.endswith("_from_c1") and
                (k.startswith("c2_") or k.startswith("h_c_"))])
    assert net.closure("c").columns == (0, 2)
    return net


def merged(raw: dict) -> ProgressiveNet:
    """Column 2's block-1 adapters (from columns 0 and 1) folded into one joint adapter
    (merge.py) that reads both columns concatenated."""
    from colonnade.trimming.merge import fit_joint, install_joint

    net = grown(raw)
    keys = [k for k, a in net.adapter_info.items()
            if a.state == "live" and a.column == 2 and a.block == 1]
    x = torch.randn(64, *net.input_shape, generator=torch.Generator().manual_seed(11))
    fit = fit_joint(net, "c", keys, x)
    install_joint(net, fit, max(1, fit.full_rank // 2))
    assert any(len(net.adapter_sources(k)) == 2 for k in net.closure("c").adapters)
    return net


VARIANTS = {"untrimmed": grown, "pruned": trimmed, "merged": merged}


@pytest.mark.parametrize("kind", sorted(SPECS))
@pytest.mark.parametrize("variant", sorted(VARIANTS))
def test_forward_all_equals_each_task_forward(kind, variant):
    net = VARIANTS[variant](SPECS[kind])
    x = torch.randn(33, *net.input_shape, generator=torch.Generator().manual_seed(7))
    with torch.no_grad():
        every = net.forward_all(x)
        assert list(every) == net.tasks
        for task in net.tasks:
            assert torch.equal(every[task], net(x, task=task)), task


def test_forward_all_runs_each_column_once():
    net = grown(DENSE)
    calls = {k: 0 for k in range(len(net.columns))}
    hooks = [col.blocks[0].weighted.register_forward_hook(
        lambda *_, k=k: calls.__setitem__(k, calls[k] + 1)) for k, col in enumerate(net.columns)]
    with torch.no_grad():
        net.forward_all(torch.randn(4, 12))
    for h in hooks:
        h.remove()
    assert calls == {0: 1, 1: 1, 2: 1}


def _functional_dense(net: ProgressiveNet, task: str, x: torch.Tensor) -> torch.Tensor:
    """The dense template by hand: Linear, BatchNorm (eval), ReLU, Linear, Tanh per column,
    linear laterals added after each weighted layer (Rusu et al. 2016, Eq. 1)."""
    s = net.state_dict()
    outs: dict[int, list[torch.Tensor]] = {}
    for k in net.closure(task).columns:
        p = f"columns.{k}.blocks."
        z = F.linear(x, s[p + "0.weighted.weight"], s[p + "0.weighted.bias"])
        h0 = F.relu(F.batch_norm(z, s[p + "0.post.0.running_mean"],
                                 s[p + "0.post.0.running_var"], s[p + "0.post.0.weight"],
                                 s[p + "0.post.0.bias"], training=False, eps=1e-5))
        z = F.linear(h0, s[p + "1.weighted.weight"], s[p + "1.weighted.bias"])
        for j in sorted(outs):
            key = f"c{k}_b1_from_c{j}"
            if net.adapter_info.get(key) and net.adapter_info[key].state == "live":
                z = z + F.linear(outs[j][0], s[f"adapters.{key}.U.weight"])
        outs[k] = [h0, torch.tanh(z)]
    column = net.task(task).column
    logits = F.linear(outs[column][-1], s[f"heads.{task}.weight"], s[f"heads.{task}.bias"])
    for j in range(column):
        key = f"h_{task}_from_c{j}"
        if net.adapter_info.get(key) and net.adapter_info[key].state == "live":
            logits = logits + F.linear(outs[j][-1], s[f"adapters.{key}.U.weight"])
    return logits


@pytest.mark.parametrize("trim", [False, True], ids=["untrimmed", "trimmed"])
def test_forward_all_matches_a_functional_recomputation(trim):
    net = trimmed(DENSE) if trim else grown(DENSE)
    x = torch.randn(20, 12, generator=torch.Generator().manual_seed(3))
    with torch.no_grad():
        every = net.forward_all(x)
        for task in net.tasks:
            # Same operations in the same order, so equal bits (torch.nn.functional).
            assert torch.equal(every[task], _functional_dense(net, task, x)), task


def test_all_task_logits_equals_task_logits_in_batches():
    net = grown(CONV1D)
    x = torch.randn(600, 2, 24, generator=torch.Generator().manual_seed(0))  # 3 batches of 256
    every = all_task_logits(net, x)
    for task in net.tasks:
        assert torch.equal(every[task], task_logits(net, task, x))


def test_predict_all_writes_every_task(tmp_path):
    ws = tmp_path / "ws"
    net = grown(DENSE)
    create(parse_spec(DENSE), ws)
    save(net, ws)
    x = np.random.default_rng(0).normal(size=(300, 12)).astype(np.float32)
    data = tmp_path / "x.npz"
    np.savez(data, x=x)
    out = tmp_path / "all.npz"
    assert main(["predict", str(ws), "--all", "--data", str(data), "-o", str(out)]) == 0
    with np.load(out, allow_pickle=False) as f:
        assert list(f["tasks"]) == net.tasks
        assert sorted(f.files) == sorted(["tasks"] + [f"{p}_{t}" for t in net.tasks
                                                     for p in ("logits", "pred")])
        for task in net.tasks:
            one = tmp_path / f"{task}.npz"
            assert main(["predict", str(ws), "--task", task, "--data", str(data),
                         "-o", str(one)]) == 0
            with np.load(one) as g:
                assert np.array_equal(f[f"logits_{task}"], g["logits"])
                assert np.array_equal(f[f"pred_{task}"], g["pred"])


def test_predict_needs_exactly_one_of_task_and_all(tmp_path, capsys):
    ws = tmp_path / "ws"
    create(parse_spec(DENSE), ws)
    save(grown(DENSE), ws)
    data = tmp_path / "x.npz"
    np.savez(data, x=np.zeros((3, 12), np.float32))
    out = tmp_path / "p.npz"
    for flags, message in ((["--all", "--task", "a"], "give either --task NAME or --all"),
                           ([], "name one task with --task NAME, or pass --all")):
        assert main(["predict", str(ws), *flags, "--data", str(data), "-o", str(out)]) == 2
        err = capsys.readouterr().err
        assert message in err
        assert "Traceback" not in err
    assert not out.exists()
