"""The grown network: freezing, gradients, parameter counts, closures, round trips.

Generic checks run over a small catalogue of example specs (dense, conv1d, conv2d; each
lateral kind), in the manner of timm's registry-driven model tests.
"""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F

from colonnade.errors import DataError, UsageError
from colonnade.files import store
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import load_spec, parse_spec

SPECS = Path(__file__).parent.parent / "specs"
CATALOGUE = ["pump_spectra.yaml", "mlp_linear.yaml", "conv1d_spectra.yaml",
             "conv2d_images.yaml"]


def _grown(spec, n_columns=3, head=True) -> ProgressiveNet:
    net = ProgressiveNet(spec)
    for k in range(n_columns):
        net.add_column(f"t{k}", 3 + k, seed=k)
        net.freeze()
    if head:
        net.add_head("h", 2, on="t1", seed=9)
        net.freeze()
    return net


@pytest.fixture(params=CATALOGUE)
def spec(request):
    return load_spec(SPECS / request.param)


@pytest.fixture(params=["none", "linear", "nonlinear"])
def lateral_kind(request):
    return request.param


def _x(spec, n=6):
    return torch.randn(n, *spec.input, generator=torch.Generator().manual_seed(1))


def test_forward_shapes(spec):
    net = _grown(spec)
    x = _x(spec)
    for name in net.tasks:
        assert net(x, task=name).shape == (6, net.task(name).classes)
    assert set(net.forward_all(x)) == set(net.tasks)


def test_forward_all_equals_per_task(spec):
    net = _grown(spec).eval()
    x = _x(spec)
    every = net.forward_all(x)
    for name in net.tasks:
        assert torch.equal(every[name], net(x, task=name))


def test_new_parts_get_gradients_frozen_parts_none(spec, lateral_kind):
    # After growing task k, backward on the new task: gradients on every new parameter
    # and none on any frozen one (the timm-style backward check).
    raw = spec.to_dict()
    raw["lateral"]["kind"] = lateral_kind
    net = _grown(parse_spec(raw), n_columns=2, head=False)
    new = net.add_column("new", 4, seed=5)
    net.train()
    loss = F.cross_entropy(net(_x(net.spec), task="new"), torch.tensor([0, 1, 2, 3, 0, 1]))
    loss.backward()
    modules = dict(net.part_modules())
    for part, module in modules.items():
        for name, p in module.named_parameters():
            if part in new:
                assert p.requires_grad and p.grad is not None and torch.isfinite(p.grad).all(), \
                    (part, name)
            else:
                assert not p.requires_grad and p.grad is None, (part, name)
    trainable = sum(p.numel() for p in net.trainable_parameters())
    assert trainable == sum(p.numel() for p in net.parameters() if p.requires_grad)
    assert trainable == sum(p.numel() for part in new for p in modules[part].parameters())
    if lateral_kind == "none":
        assert new == ["column:2", "head:new"]


def test_frozen_parts_stay_in_eval_mode(spec):
    net = _grown(spec, n_columns=2, head=False)
    net.add_column("new", 3, seed=1)
    net.train()
    for part, module in net.part_modules():
        for m in module.modules():
            assert m.training == (part in net.trainable_parts), part


def test_frozen_batch_norm_statistics_do_not_move():
    spec = load_spec(SPECS / "pump_spectra.yaml")
    net = _grown(spec, n_columns=1, head=False)
    before = copy.deepcopy(net.columns[0].state_dict())
    net.add_column("new", 3, seed=1)
    net.train()
    for _ in range(3):
        net(_x(spec, 16), task="new").sum().backward()
    after = net.columns[0].state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)


def test_state_dict_round_trip(spec):
    net = _grown(spec)
    twin = ProgressiveNet.from_architecture(spec, net.architecture())
    twin.load_state_dict(net.state_dict())
    x = _x(spec)
    for name in net.tasks:
        assert torch.equal(twin.eval()(x, task=name), net.eval()(x, task=name))


def test_parameter_count_closed_form_linear_laterals():
    # Rusu et al. 2016, Eq. 1: column k adds its own layers (weights and biases) plus one
    # bias-free lateral map U per earlier column into every layer above the first and
    # into the head. For a 64-100-100 template with 10 classes:
    spec = parse_spec({"input": [64], "column": [{"dense": 100}, {"act": "relu"},
                                                 {"dense": 100}, {"act": "relu"}],
                       "lateral": {"kind": "linear"}})
    n0, n1, n2, c = 64, 100, 100, 10
    column = (n0 * n1 + n1) + (n1 * n2 + n2)
    head = n2 * c + c
    net = ProgressiveNet(spec)
    for k in range(5):
        parts = net.add_column(f"t{k}", c, seed=k)
        net.freeze()
        added = sum(p.numel() for part in parts for p in dict(net.part_modules())[part]
                    .parameters())
        assert added == column + head + k * (n1 * n2) + k * (n2 * c)
    total = 5 * (column + head) + (n1 * n2 + n2 * c) * (0 + 1 + 2 + 3 + 4)
    assert total == sum(p.numel() for p in net.parameters())


def test_closure_holds_only_earlier_reachable_columns():
    spec = load_spec(SPECS / "mlp_linear.yaml")
    net = _grown(spec, n_columns=3, head=True)
    assert net.closure("t0").columns == (0,)
    assert net.closure("t2").columns == (0, 1, 2)
    assert net.closure("h").columns == (0, 1)
    assert all("c2_" not in a for a in net.closure("h").adapters)
    keys = net.closure_state("t0")
    assert keys and all(k.startswith(("columns.0.", "heads.t0.")) for k in keys)


def test_growing_never_changes_earlier_logits(spec):
    net = _grown(spec, n_columns=1, head=False).eval()
    x = _x(spec)
    ref = net(x, task="t0")
    net.add_column("b", 3, width=0.5, seed=3)
    net.freeze()
    net.add_head("c", 2, seed=4)
    net.freeze()
    assert torch.equal(net.eval()(x, task="t0"), ref)


def test_width_factor_scales_weighted_layers():
    spec = load_spec(SPECS / "pump_spectra.yaml")
    net = ProgressiveNet(spec)
    net.add_column("a", 3)
    net.freeze()
    net.add_column("b", 3, width=0.5)
    assert net.columns[1].blocks[0].weighted.out_features == 64
    assert net.columns[1].out_features == 32
    assert net.adapters["c1_b1_from_c0"].source_shape == (128,)


def test_remove_task_restores_the_network():
    spec = load_spec(SPECS / "mlp_linear.yaml")
    net = _grown(spec, n_columns=2, head=False)
    before = {k: v.clone() for k, v in net.state_dict().items()}
    net.add_column("x", 3)
    net.remove_task("x")
    after = net.state_dict()
    assert before.keys() == after.keys()
    assert all(torch.equal(before[k], after[k]) for k in before)
    net.add_head("y", 3)
    net.remove_task("y")
    assert net.state_dict().keys() == before.keys()


def test_bad_growth_requests():
    spec = load_spec(SPECS / "mlp_linear.yaml")
    net = ProgressiveNet(spec)
    with pytest.raises(UsageError, match="no column yet"):
        net.add_head("h", 2)
    net.add_column("a", 3)
    with pytest.raises(UsageError, match="exists already"):
        net.add_column("a", 3)
    with pytest.raises(UsageError, match="must start with a letter"):
        net.add_column("a.b", 3)
    with pytest.raises(UsageError, match="at least 2 classes"):
        net.add_column("b", 1)
    with pytest.raises(UsageError, match="width must be"):
        net.add_column("b", 3, width=0)
    with pytest.raises(DataError, match="expects \\[64\\]"):
        net(torch.zeros(2, 63), task="a")


def test_extra_repr_shows_tasks_and_frozen_state():
    net = _grown(load_spec(SPECS / "mlp_linear.yaml"), n_columns=2, head=False)
    assert "tasks=['t0', 't1']" in repr(net) and "all frozen" in repr(net)


def test_save_load_round_trip_is_bit_identical(tmp_path, spec):
    net = _grown(spec).eval()
    ws = tmp_path / "ws"
    ws.mkdir()
    store.save(net, ws)
    back = store.load(ws)
    x = _x(spec)
    assert back.tasks == net.tasks
    for name in net.tasks:
        assert torch.equal(back(x, task=name), net(x, task=name))
