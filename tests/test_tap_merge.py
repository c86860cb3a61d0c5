"""Merging adapters that read an adopted column's taps, with the other adapters into a layer.

A tap adapter keeps its own shape bridge inside the joint adapter (model.adapters
``JointAdapter``: U (V [columns] + T bridge(tap))). References, each named beside its
check: torch's own functional ops (``F.interpolate``, ``F.adaptive_avg_pool2d``,
``F.conv2d``, ``F.linear``) on the user's model's tap read by a hook on the user's module,
for the summed output a merge must reproduce; the unmerged network's own torch forward
for the task's logits; ``FlopCounterMode`` and ``numel()`` for costs; ``torch.load(...,
weights_only=True)`` and onnxruntime for the exported files; the seal check, which
compares SHA-256 digests and probe logits byte for byte.
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest
import torch
import torch.nn.functional as F
import yaml
from adopt_helpers import small_cnn
from conftest import called_tensors, flop_macs, snapshot

import colonnade
from colonnade.cli import main
from colonnade.costing import costs
from colonnade.errors import SealedError, WorkspaceError
from colonnade.evidence.artifact import ONNX_TOLERANCE
from colonnade.files.standalone import load_artifact
from colonnade.files.store import create, load
from colonnade.model.adapters import JointAdapter
from colonnade.model.exported import load_exported_program
from colonnade.model.network import ProgressiveNet
from colonnade.training.cache import FrozenActivations
from colonnade.training.validation import store_validation
from colonnade.trimming import merge
from colonnade.trimming.usage import measure

SHAPE = (3, 16, 16)
TAPS = ["2", "4"]  # small_cnn's second convolution ([8, 4, 4]) and its pooling ([8, 1, 1])
LAYERS = {  # the adapters into each layer of task b's column 2: the tap's first
    "block 1": ["c2_b1_from_c0", "c2_b1_from_c1"],  # a 4x4 tap upsampled into 8x8
    "block 2": ["c2_b2_from_c0", "c2_b2_from_c1"],  # a conv tap pooled into a dense block
    "head": ["h_b_from_c0", "h_b_from_c1"],
}


def _spec(tmp_path: Path, kind: str = "linear", bridge: str = "pool", width: int = 4) -> str:
    path = tmp_path / f"spec_{kind}_{bridge}_{width}.yaml"
    path.write_text(yaml.safe_dump({
        "input": list(SHAPE),
        "column": [{"conv2d": width, "kernel": 3, "padding": 1}, {"act": "relu"},
                   {"conv2d": width, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 8}],
        "lateral": {"kind": kind, "bridge": bridge}, "train": {"epochs": 1}}))
    return str(path)


def _net(tmp_path: Path, model=None, columns: int = 2, **spec):
    net = colonnade.adopt(model if model is not None else small_cnn(), SHAPE, "t", TAPS,
                          _spec(tmp_path, **spec))
    for i, name in enumerate(["a", "b", "c"][:columns]):
        net.add_column(name, 3, seed=i)
    net.freeze()
    return net


def _rows(n: int, seed: int = 0) -> torch.Tensor:
    return torch.rand(n, *SHAPE, generator=torch.Generator().manual_seed(seed))


def _user_taps(x: torch.Tensor) -> dict[str, torch.Tensor]:
    """The taps as the user's own module computes them: forward hooks on small_cnn."""
    model, seen = small_cnn(), {}
    for name in TAPS:
        model[int(name)].register_forward_hook(
            lambda m, i, o, name=name: seen.__setitem__(name, o.detach().clone()))
    with torch.no_grad():
        model(x)
    return seen


def _by_torch(net, keys: list[str], x: torch.Tensor) -> torch.Tensor:
    """The linear adapters' summed output, from their weights with torch's functional ops:
    the tap from the user's module through F.interpolate / F.adaptive_avg_pool2d, the
    column's block output from the network's own forward (an ordinary merge's input)."""
    taps, total = _user_taps(x), 0
    with torch.no_grad():
        outs = net.run_columns(x, [0, 1])
    for key in keys:
        info, ad = net.adapter_info[key], net.adapters[key]
        if "tap" in info.extra:
            h = taps[info.extra["tap_name"]]
            if len(ad.target_shape) == 1:  # pooled (or flattened) into a dense layer
                h = (h.flatten(1) if isinstance(ad.bridge, torch.nn.Flatten)
                     else F.adaptive_avg_pool2d(h, 1).flatten(1))
                total = total + F.linear(h, ad.U.weight)
            else:  # resampled to the block's positions, then a 1x1 convolution
                h = F.interpolate(h, size=tuple(ad.target_shape[1:]), mode="nearest")
                total = total + F.conv2d(h, ad.U.weight)
        else:
            h = outs[1][-1] if info.head is not None else outs[1][info.block - 1]
            if len(ad.target_shape) == 1:
                total = total + F.linear(h, ad.U.weight)
            else:
                total = total + F.conv2d(h, ad.U.weight, stride=ad.U.stride,
                                         padding=ad.U.padding)
    return total.double()


def _joint_output(net, key: str, x: torch.Tensor) -> torch.Tensor:
    """The joint adapter's output as the network's forward computes it (a forward hook)."""
    seen = {}
    handle = net.adapters[key].register_forward_hook(lambda m, i, o: seen.setdefault("y", o))
    with torch.no_grad():
        net(x, task=net.adapter_info[key].head or "b")
    handle.remove()
    return seen["y"].double()


# ----------------------------------------------------------------------------- exactness
@pytest.mark.parametrize("bridge", ["pool", "flatten"])
@pytest.mark.parametrize("layer", sorted(LAYERS))
def test_a_tap_merge_at_full_rank_reproduces_the_unmerged_network(tmp_path, layer, bridge):
    net = _net(tmp_path, bridge=bridge)
    x = _rows(70)
    keys = LAYERS[layer]
    want = _by_torch(net, keys, x)
    with torch.no_grad():
        before = {t: net(x, task=t) for t in net.tasks}
    fit = merge.fit_joint(net, "b", keys, x)
    assert fit.tap == TAPS.index(net.adapter_info[keys[0]].extra["tap_name"])
    key, undo = merge.install_joint(net, fit, fit.full_rank)
    joint = net.adapters[key]
    assert isinstance(joint, JointAdapter) and joint.tap_shape is not None
    assert net.adapter_info[key].sources == (0, 1)
    assert all(net.adapter_info[k].state == "merged" for k in keys)
    # At full rank the joint map equals the sum exactly in real arithmetic (the tap
    # adapter is linear in its bridged tap); 1e-5 is float32 rounding over sums of a few
    # dozen products, the bound tests/test_trim.py uses for ordinary merges.
    assert (_joint_output(net, key, x) - want).abs().max().item() <= 1e-5
    with torch.no_grad():
        after = {t: net(x, task=t) for t in net.tasks}
    assert (after["b"] - before["b"]).abs().max().item() <= 1e-5  # torch's own forward
    for t in ("t", "a"):  # other tasks do not read column 2: untouched, bit for bit
        assert torch.equal(after[t], before[t])
    # Below full rank, the error the fit reports is the one measured against torch's sum.
    merge.uninstall_joint(net, undo)
    for rank in (1, fit.full_rank - 1):
        key, undo = merge.install_joint(net, fit, rank)
        measured = ((_joint_output(net, key, x) - want).norm() / want.norm()).item()
        assert fit.error(rank) == pytest.approx(measured, abs=1e-5)  # float32, as above
        merge.uninstall_joint(net, undo)


def test_a_tap_merges_with_several_columns(tmp_path):
    net = _net(tmp_path, columns=3)  # block 1 of column 3 reads the tap, c1 and c2
    x = _rows(70, 1)
    keys = ["c3_b1_from_c0", "c3_b1_from_c1", "c3_b1_from_c2"]
    with torch.no_grad():
        before = net(x, task="c")
    fit = merge.fit_joint(net, "c", keys, x)
    key, _ = merge.install_joint(net, fit, fit.full_rank)
    assert net.adapter_sources(key) == (0, 1, 2)
    assert net.adapters[key].source_shape[0] == 8  # the two columns' channels, concatenated
    with torch.no_grad():
        assert (net(x, task="c") - before).abs().max().item() <= 1e-5  # as above


def test_a_nonlinear_tap_merge_reports_the_error_it_has(tmp_path):
    net = _net(tmp_path, kind="nonlinear")
    x = _rows(70, 2)
    fit = merge.fit_joint(net, "b", LAYERS["block 1"], x)
    # A relu between V and U: no linear map is exact (the bound of tests/test_trim.py).
    assert fit.error(fit.full_rank) > 1e-3
    with torch.no_grad():
        summed = sum(net.adapters[k](net.run_columns(x, [0, 1])[s][i]).double()
                     for k, s, i in ((LAYERS["block 1"][0], 0, 0), (LAYERS["block 1"][1], 1, 0)))
    key, _ = merge.install_joint(net, fit, fit.full_rank)
    got = _joint_output(net, key, x)
    assert fit.error(fit.full_rank) == pytest.approx(
        ((got - summed).norm() / summed.norm()).item(), abs=1e-5)


# ----------------------------------------------------------------------------- the rest
def _pt2(tmp_path: Path) -> Path:
    program = torch.export.export(small_cnn(), (torch.zeros(2, *SHAPE),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / "inspect.pt2")
    return tmp_path / "inspect.pt2"


@pytest.fixture(scope="module")
def merged(tmp_path_factory):
    """A .pt2-adopted workspace, tasks t and a sealed, b trimmed with --merge."""
    tmp_path = tmp_path_factory.mktemp("tapmerge")
    net = _net(tmp_path, model=str(_pt2(tmp_path)), width=16)
    g = torch.Generator().manual_seed(2)
    for task in net.tasks:  # what an export records its reference outputs on
        store_validation(net, task, torch.rand(40, *SHAPE, generator=g),
                         torch.randint(0, 3, (40,), generator=g))
    ws = tmp_path / "ws"
    create(net.spec, ws, net)
    rng = np.random.default_rng(1)
    probe = tmp_path / "probe.npz"
    np.savez(probe, x=rng.random((30, *SHAPE), dtype=np.float32), y=np.arange(30) % 3)
    for task in ("t", "a"):
        assert main(["seal", str(ws), "--task", task, "--probe", str(probe)]) == 0
    g = torch.Generator().manual_seed(3)  # rows of varied scale: every adapter matters
    x = torch.randn(200, *SHAPE, generator=g) * torch.rand(200, 1, 1, 1, generator=g) * 4
    with torch.no_grad():
        labels = net(x, task="b").argmax(1)  # labels the unmerged task gets all right
    data = tmp_path / "b.npz"
    np.savez(data, x=x.numpy(), y=labels.numpy())
    before = load(ws)
    assert main(["trim", str(ws), "--task", "b", "--data", str(data), "--merge",
                 "--max-drop", "1", "--reason", "a smaller path"]) == 0
    return ws, before, tmp_path, x


def test_trim_merge_joins_the_tap_adapters_and_the_workspace_checks(merged, capsys):
    ws, before, _, x = merged
    back = load(ws)
    merges = [e for e in back.meta["history"] if e.get("step") == "adapters_merged"]
    tapped = [e for e in merges if "tap" in e]
    assert tapped, merges  # at least one layer's tap adapter was merged
    for e in tapped:
        info = back.adapter_info[e["into"]]
        assert info.kind == "joint" and info.sources[0] == 0 and info.extra["tap_name"] == e["tap"]
        assert back.adapters[e["into"]].tap_shape is not None
        assert all(back.adapter_info[k].state == "merged" for k in e["adapters"])
    with torch.no_grad():
        for task in ("t", "a"):  # sealed: bit for bit
            assert torch.equal(back(x, task=task), before(x, task=task))
        # within the --max-drop it ran with: labels were the unmerged task's predictions
        assert (back(x, task="b").argmax(1) == before(x, task="b").argmax(1)).float().mean() \
            >= 0.99
        again = load(ws)  # rebuilt from the manifest, bit for bit
        assert torch.equal(again(x, task="b"), back(x, task="b"))
    capsys.readouterr()
    assert main(["check", str(ws)]) == 0
    folder = merged[2]  # the verbs that read a network read this one too
    for argv in (["show", ws], ["cost", ws, "--project", "2"],
                 ["draw", ws, "-o", folder / "net.dot"]):
        assert main([str(a) for a in argv]) == 0, argv


def test_merged_tap_adapters_export_to_pt_and_onnx(merged, capsys):
    ws, _, tmp_path, x = merged
    back = load(ws)
    pt = tmp_path / "b.pt"
    assert main(["export", str(ws), "--task", "b", "-o", str(pt)]) == 0
    model, _ = load_artifact(pt, program_loader=load_exported_program)  # weights_only=True
    with torch.no_grad():
        assert torch.equal(model(x)[0], back(x, task="b"))  # torch's forward, bit for bit
    onnx_file = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(onnx_file)]) == 0
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    session = ort.InferenceSession(str(onnx_file), options,
                                   providers=["CPUExecutionProvider"])
    got = session.run(None, {"x": x[:50].numpy()})
    with torch.no_grad():
        want = back.forward_all(x[:50])
    for task, values in zip(back.tasks, got, strict=True):
        assert np.abs(values - want[task].numpy()).max() <= ONNX_TOLERANCE, task
    capsys.readouterr()
    for artifact in (pt, onnx_file):
        assert main(["check", str(ws), "--artifact", str(artifact)]) == 0


def test_costs_of_a_tap_merge_match_flop_counter_and_numel(merged):
    back = load(merged[0])
    x = torch.rand(1, *SHAPE)
    joints = [k for k, a in back.adapter_info.items() if a.kind == "joint" and a.state == "live"]
    assert any(back.adapters[k].tap_shape is not None for k in joints)
    for task in back.tasks:
        cost = costs.task_cost(back, task)
        # Sources: FlopCounterMode over the real forward; numel() of the called modules.
        assert cost.path.macs == flop_macs(lambda t=task: back(x, task=t))
        used = called_tensors(back, lambda t=task: back(x, task=t))
        params = dict(back.named_parameters())
        assert cost.path.params.total - costs.count_params(back.columns[0], "column").total \
            == sum(params[k].numel() for k in used if k in params and not
                   k.startswith("columns.0."))
    assert costs.network_cost(back).macs == flop_macs(back.forward_all, x)
    for key in joints:
        joint = back.adapters[key]
        args = [torch.randn(1, *joint.source_shape)]
        if joint.tap_shape is not None:
            args.append(torch.randn(1, *joint.tap_shape))
        assert costs.adapter_macs(joint) == flop_macs(joint, *args)


def test_a_sealed_closure_is_never_merged(merged, tmp_path):
    ws, _, folder, _ = merged
    before = snapshot(ws)
    # a sealed task is refused as a whole, and nothing on disk changes
    assert main(["trim", str(ws), "--task", "a", "--data", str(folder / "b.npz"), "--merge",
                 "--reason", "x"]) == 2
    assert snapshot(ws) == before
    # and the choke point refuses to retire an adapter of a sealed closure for a merge
    net = _net(tmp_path, model=str(_pt2(tmp_path)))
    wsb = tmp_path / "wsb"
    create(net.spec, wsb, net)
    probe = tmp_path / "p.npz"
    np.savez(probe, x=_rows(10, 5).numpy(), y=np.arange(10) % 3)
    assert main(["seal", str(wsb), "--task", "b", "--probe", str(probe)]) == 0
    sealed = load(wsb)
    fit = merge.fit_joint(sealed, "b", LAYERS["block 1"], _rows(40, 4))
    with pytest.raises(SealedError):
        merge.install_joint(sealed, fit, fit.full_rank)
    assert all(sealed.adapter_info[k].state == "live" for k in LAYERS["block 1"])


def test_training_cache_and_usage_read_a_merged_tap(tmp_path):
    net = _net(tmp_path)
    x = _rows(64, 6)
    for layer in LAYERS.values():
        fit = merge.fit_joint(net, "b", layer, x)
        merge.install_joint(net, fit, fit.full_rank)
    with torch.no_grad():
        want = net(x, task="b")
    joints = [f"adapter:{k}" for k, a in net.adapter_info.items()
              if a.kind == "joint" and a.state == "live"]
    net._make_trainable(["column:2", *joints])  # column 2 reads cached column 0 and 1
    with FrozenActivations(net, "b", x, 64, 1 << 30) as cache:
        assert set(cache.needed) == {0, 1} and cache.needed[0] == (0, 1)  # both taps
        net.eval()
        with torch.no_grad():
            assert torch.equal(net(x, task="b", given=cache.rows(slice(0, 64))), want)
    net.freeze()
    usage = measure(net, "b", x, torch.arange(64) % 3, repeats=1)
    assert {u.key for u in usage.adapters} == {j.split(":", 1)[1] for j in joints}
    with torch.no_grad():
        assert torch.equal(net(x, task="b"), want)  # hooks only looked


def test_a_joint_adapters_tap_out_of_range_is_refused_in_one_sentence(tmp_path):
    net = _net(tmp_path)
    fit = merge.fit_joint(net, "b", LAYERS["block 1"], _rows(40, 7))
    key, _ = merge.install_joint(net, fit, fit.full_rank)
    arch = net.architecture()
    rebuilt = ProgressiveNet.from_architecture(net.spec, arch, net.columns[0])
    assert rebuilt.adapters[key].tap_shape == net.adapters[key].tap_shape  # as recorded
    for bad in (7, -1, "0"):
        edited = copy.deepcopy(arch)
        next(a for a in edited["adapters"] if a["key"] == key)["extra"]["tap"] = bad
        with pytest.raises(WorkspaceError, match=r"extra\.tap: expected a whole number"):
            ProgressiveNet.from_architecture(net.spec, edited, net.columns[0])
