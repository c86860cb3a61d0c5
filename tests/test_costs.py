"""Costs: MACs against torch.utils.flop_counter, parameters against numel(), bytes against
IEEE 754 element sizes, and peak activation memory against a hand computation.

FlopCounterMode (PyTorch's own counter) counts 2 FLOPs per multiply-accumulate of matmul
and convolution and nothing for elementwise ops, so its total / 2 must equal our MACs
exactly, layer by layer and task by task.
"""

from __future__ import annotations

import copy
import math
from pathlib import Path

import pytest
import torch
import torch.nn as nn
from conftest import called_tensors, flop_macs  # forward hooks; FlopCounterMode FLOPs / 2

from colonnade.costing import costs
from colonnade.model.adapters import make_adapter
from colonnade.model.layers import build_layer, layer_output_shape
from colonnade.model.network import ProgressiveNet
from colonnade.model.schema import Conv1d, Conv2d, Dense
from colonnade.model.spec import load_spec, parse_spec

SPECS = Path(__file__).parent.parent / "specs"
CATALOGUE = ["pump_spectra.yaml", "mlp_linear.yaml", "conv1d_spectra.yaml",
             "conv2d_images.yaml"]


def _spec(name: str, lateral: str):
    raw = load_spec(SPECS / name).to_dict()
    raw["lateral"]["kind"] = lateral
    return parse_spec(raw)


def _grown(spec) -> ProgressiveNet:
    """Three columns of mixed widths and a head-only task, all frozen."""
    torch.manual_seed(0)
    net = ProgressiveNet(spec)
    for k, width in enumerate([1.0, 0.5, 1.5]):
        net.add_column(f"t{k}", 3 + k, width=width, seed=k)
        net.freeze()
    net.add_head("h", 2, on="t1", seed=7)
    net.freeze()
    return net.eval()


# ----------------------------------------------------------------------------- layers alone
LAYERS = [
    (Dense(dense=7), (5,)),
    (Conv1d(conv1d=4, kernel=3), (2, 11)),
    (Conv1d(conv1d=6, kernel=5, stride=2, padding=2), (3, 17)),
    (Conv2d(conv2d=4, kernel=3, padding=1), (2, 6, 6)),
    (Conv2d(conv2d=5, kernel=2, stride=2), (3, 7, 9)),
]


@pytest.mark.parametrize("layer,shape", LAYERS, ids=lambda v: str(v)[:30])
def test_weighted_layer_macs_match_flop_counter(layer, shape):
    module = build_layer(layer, shape).eval()
    x = torch.randn(1, *shape)
    # Source: torch.utils.flop_counter.FlopCounterMode, FLOPs / 2.
    assert costs.layer_macs(module, shape) == flop_macs(module, x)
    # Output shape from hyperparameters equals the real forward's (source: torch itself).
    assert costs.module_output_shape(module, shape) == tuple(module(x).shape[1:])
    assert costs.module_output_shape(module, shape) == layer_output_shape(layer, shape)


UNWEIGHTED = [
    ({"norm": "batch"}, (4,)), ({"norm": "batch"}, (3, 8)), ({"norm": "batch"}, (3, 4, 4)),
    ({"norm": "layer"}, (6,)), ({"norm": "layer"}, (3, 8)), ({"act": "gelu"}, (5,)),
    ({"act": "leaky_relu"}, (2, 5)), ({"dropout": 0.3}, (4,)),
    ({"pool": "max", "size": 2}, (3, 9)), ({"pool": "avg", "size": 2, "stride": 1}, (2, 5, 5)),
    ({"pool": "global_avg"}, (3, 8)), ({"pool": "global_avg"}, (3, 4, 4)),
    ({"flatten": True}, (2, 3, 4)),
]


@pytest.mark.parametrize("raw,shape", UNWEIGHTED, ids=lambda v: str(v)[:30])
def test_unweighted_layers_count_no_macs(raw, shape):
    spec = parse_spec({"input": list(shape), "column": [raw, {"flatten": True}, {"dense": 2}]})
    layer = spec.column[0]
    module = build_layer(layer, shape).eval()
    x = torch.randn(1, *shape)
    # Source: FlopCounterMode counts no FLOPs for norms, activations, pooling, views.
    assert flop_macs(module, x) == 0
    assert costs.layer_macs(module, shape) == 0
    assert costs.module_output_shape(module, shape) == tuple(module(x).shape[1:])


ADAPTER_CASES = [
    ((12,), (8,), Dense(dense=8)),
    ((4, 10), (6, 10), Conv1d(conv1d=6, kernel=3, padding=1)),
    ((4, 11), (6, 5), Conv1d(conv1d=6, kernel=3, stride=2)),
    ((3, 6, 6), (5, 6, 6), Conv2d(conv2d=5, kernel=3, padding=1)),
    ((10,), (3,), Dense(dense=3)),  # a head adapter into 3 classes
]


@pytest.mark.parametrize("kind", ["linear", "nonlinear"])
@pytest.mark.parametrize("source,target,layer", ADAPTER_CASES, ids=lambda v: str(v)[:20])
def test_adapter_macs_match_flop_counter(kind, source, target, layer):
    torch.manual_seed(0)
    adapter = make_adapter(kind, source, target, layer, reduce=0.5, activation="relu").eval()
    x = torch.randn(1, *source)
    assert tuple(adapter(x).shape[1:]) == target
    # Source: FlopCounterMode; alpha * h is elementwise and counts nothing there either.
    assert costs.adapter_macs(adapter) == flop_macs(adapter, x)
    assert costs.count_params(adapter, "adapters").total == sum(
        p.numel() for p in adapter.parameters())  # source: numel()


def test_head_macs_match_flop_counter():
    head = nn.Linear(32, 5)
    assert costs.layer_macs(head, (32,)) == flop_macs(head, torch.randn(1, 32))


# ----------------------------------------------------------------------------- whole networks
@pytest.fixture(scope="module", params=[(s, k) for s in CATALOGUE
                                        for k in ("none", "linear", "nonlinear")],
                ids=lambda p: f"{p[0][:-5]}-{p[1]}")
def grown(request):
    spec = _spec(*request.param)
    return _grown(spec)


def test_task_macs_match_flop_counter(grown):
    x = torch.randn(1, *grown.input_shape)
    for task in grown.tasks:
        cost = costs.task_cost(grown, task)
        # Source: FlopCounterMode over the task's real forward pass, FLOPs / 2.
        assert cost.path.macs == flop_macs(lambda t=task: grown(x, task=t))
        assert cost.path.flops == 2 * cost.path.macs
        assert sum(cost.path.macs_by_part.values()) == cost.path.macs
    total = costs.network_cost(grown)
    assert total.macs == flop_macs(grown.forward_all, x)


def _called(net, task):
    """State keys the task's forward really reads: forward hooks on the called modules."""
    x = torch.zeros(1, *net.input_shape)
    return called_tensors(net, lambda: net(x, task=task))


def _numel(net, keys, prefix=""):
    params = dict(net.named_parameters())
    return sum(params[k].numel() for k in keys if k in params and k.startswith(prefix))


def test_params_match_numel(grown):
    ledger = costs.ledger_of(grown)
    buffers = dict(grown.named_buffers())
    for t in ledger.tasks:
        used = _called(grown, t.task)
        # Source: numel() of the parameters of the modules the forward calls.
        assert t.path.params.total == _numel(grown, used)
        assert t.path.params.column == _numel(grown, used, "columns.")
        assert t.path.params.adapters == _numel(grown, used, "adapters.")
        assert t.path.params.head == grown.heads[t.task].weight.numel() + grown.heads[
            t.task].bias.numel()
        assert t.path.params.frozen == t.path.params.total and t.path.params.trainable == 0
        assert t.path.params.buffers == sum(buffers[k].numel() for k in used if k in buffers)
    # Every parameter belongs to exactly one task: the sum of params_added is the network.
    assert sum(t.added.total for t in ledger.tasks) == sum(p.numel() for p in grown.parameters())
    assert ledger.total.params.total == sum(p.numel() for p in grown.parameters())
    assert ledger.total.params.buffers == sum(b.numel() for b in grown.buffers())


def test_trainable_split_matches_requires_grad():
    net = ProgressiveNet(_spec("mlp_linear.yaml", "nonlinear"))
    net.add_column("a", 3, seed=0)
    net.freeze()
    parts = net.add_column("b", 4, seed=1)  # left trainable, as during training
    cost = costs.task_cost(net, "b")
    modules = dict(net.part_modules())
    new = sum(p.numel() for part in parts for p in modules[part].parameters())
    # Source: requires_grad and numel() of the parameters themselves.
    assert cost.path.params.trainable == new == sum(
        p.numel() for p in net.parameters() if p.requires_grad)
    assert cost.path.params.frozen == sum(p.numel() for p in modules["column:0"].parameters())
    assert cost.added.total == new


# IEEE 754 interchange widths: binary32 is 32 bits, binary16 16 bits; bfloat16 is 16 bits
# (the top half of binary32); int8 is 8 bits. torch.finfo / iinfo report the same widths.
WIDTH_BITS = {"fp32": 32, "fp16": 16, "bf16": 16, "int8": 8}
TORCH_DTYPES = {"fp32": torch.float32, "fp16": torch.float16, "bf16": torch.bfloat16,
                "int8": torch.int8}


def test_weight_bytes_are_numel_times_element_size(grown):
    numel = sum(p.numel() for p in grown.parameters())
    total = costs.network_cost(grown).weight_bytes
    for name, dtype in TORCH_DTYPES.items():
        info = torch.iinfo(dtype) if name == "int8" else torch.finfo(dtype)
        assert info.bits == WIDTH_BITS[name]  # source: IEEE 754 widths, as torch reports them
        assert total[name] == numel * WIDTH_BITS[name] // 8
    # The network really cast to half precision holds exactly that many bytes (source: torch).
    half = copy.deepcopy(grown).to(torch.float16)
    assert total["fp16"] == sum(p.numel() * p.element_size() for p in half.parameters())


def test_pruned_adapter_leaves_the_path():
    """Costs come from the live closure: an adapter taken out of it stops counting."""
    net = _grown(_spec("pump_spectra.yaml", "nonlinear"))
    before = costs.task_cost(net, "t2")
    key = "c2_b1_from_c0"
    gone = sum(p.numel() for p in net.adapters[key].parameters())
    gone_macs = costs.adapter_macs(net.adapters[key])
    net.adapter_info[key].state = "pruned"
    net._reindex()
    after = costs.task_cost(net, "t2")
    assert after.path.params.total == before.path.params.total - gone
    assert after.path.macs == before.path.macs - gone_macs
    x = torch.randn(1, *net.input_shape)
    assert after.path.macs == flop_macs(lambda: net(x, task="t2"))


# ----------------------------------------------------------------------------- activations
def _tiny() -> ProgressiveNet:
    spec = parse_spec({"input": [3], "column": [{"dense": 4}, {"act": "relu"}, {"dense": 2}],
                       "lateral": {"kind": "linear"}})
    net = ProgressiveNet(spec)
    net.add_column("a", 2, seed=0)
    net.add_column("b", 3, seed=1)
    net.freeze()
    return net


def test_peak_activation_by_hand():
    """Elements alive at each step, written out (x: input; z/h: column 0; y/g: column 1).

    Task a (column 0 only):
      dense0   x3 + z0 4                      = 7   (x freed: nobody else reads it)
      relu     z0 4 + h0 4                    = 8   <- peak (z0 freed after)
      dense1   h0 4 + z1 2                    = 6
      head a   z1 2 + logits 2                = 4
    Task b (columns 0 and 1, adapter U: h0 -> column 1 block 1, head adapter U: z1 -> head):
      c0 dense0  x3 + z0 4                    = 7   (x kept: column 1 reads it)
      c0 relu    x3 + z0 4 + h0 4             = 11
      c0 dense1  x3 + h0 4 + z1 2             = 9   (h0, z1 kept for the adapters)
      c1 dense0  x3 + h0 4 + z1 2 + y0 4      = 13  (x freed after)
      c1 relu    h0 4 + z1 2 + y0 4 + g0 4    = 14  <- peak
      c1 dense1  h0 4 + z1 2 + g0 4 + y1 2    = 12
      adapter U  h0 4 + z1 2 + y1 2 + a 2     = 10
      sum        z1 2 + y1 2 + a 2 + s 2      = 8
      head b     z1 2 + s 2 + l 3             = 7
      head ad. U z1 2 + l 3 + a' 3            = 8
      sum        l 3 + a' 3 + l' 3            = 9
    forward_all runs both heads after both columns; the peak is still column 1's relu, 14.
    """
    net = _tiny()
    a = costs.task_cost(net, "a").path
    b = costs.task_cost(net, "b").path
    assert (a.activation_elements, a.activation_peak_at) == (8, "column 0 block 0 post.0")
    assert (b.activation_elements, b.activation_peak_at) == (14, "column 1 block 0 post.0")
    assert a.activation_bytes["fp32"] == 8 * 4 and b.activation_bytes["int8"] == 14
    assert costs.network_cost(net).activation_elements == 14


def test_peak_activation_views_write_nothing():
    """Flatten and dropout are views; a conv map, its pool and flatten by hand.

    input [1, 6] -> conv1d 2 ch k3 -> [2, 4] -> max pool 2 -> [2, 2] -> flatten -> dropout
    -> dense 3 -> head 2. Steps: conv x6 + c8 = 14 <- peak; pool c8 + p4 = 12; dense p4 + d3
    = 7; head d3 + l2 = 5.
    """
    spec = parse_spec({"input": [1, 6], "column": [
        {"conv1d": 2, "kernel": 3}, {"pool": "max", "size": 2}, {"flatten": True},
        {"dropout": 0.5}, {"dense": 3}], "lateral": {"kind": "none"}})
    net = ProgressiveNet(spec)
    net.add_column("a", 2, seed=0)
    net.freeze()
    path = costs.task_cost(net, "a").path
    assert path.activation_elements == 14
    assert math.prod((2, 4)) + 6 == path.activation_elements


def _merge_by_hand(net, keys, rank=3):
    """Replace single-source adapters into one layer by a joint adapter, as a merge does."""
    from colonnade.model.adapters import JointAdapter
    from colonnade.model.network import AdapterInfo

    infos = [net.adapter_info[k] for k in keys]
    sources = tuple(i.source for i in infos)
    shapes, target_shape, target = net.lateral_geometry(sources, infos[0].column,
                                                        infos[0].block, infos[0].head)
    key = "joint_" + "_".join(keys)
    for k in keys:
        net.adapter_info[k].state = "merged"
        del net.adapters[k]
    net.adapters[key] = JointAdapter(shapes, target_shape, target, rank)
    net.adapter_info[key] = AdapterInfo(key, "joint", sources[0], column=infos[0].column,
                                        block=infos[0].block, head=infos[0].head,
                                        extra={"sources": list(sources), "rank": rank})
    net._reindex()
    net.freeze()
    return key


@pytest.mark.parametrize("name", ["mlp_linear.yaml", "conv1d_spectra.yaml"])
def test_joint_adapters_are_costed_from_the_live_modules(name):
    net = _grown(_spec(name, "nonlinear"))
    key = _merge_by_hand(net, ["c2_b1_from_c0", "c2_b1_from_c1"])
    x = torch.randn(1, *net.input_shape)
    ledger = costs.ledger_of(net)
    for t in ledger.tasks:
        # Sources: FlopCounterMode over the real forward; numel() of the called modules.
        assert t.path.macs == flop_macs(lambda task=t.task: net(x, task=task))
        assert t.path.params.total == _numel(net, _called(net, t.task))
    assert sum(t.added.total for t in ledger.tasks) == sum(p.numel() for p in net.parameters())
    assert ledger.total.macs == flop_macs(net.forward_all, x)
    assert costs.adapter_macs(net.adapters[key]) == flop_macs(
        net.adapters[key], torch.randn(1, *net.adapters[key].source_shape))
    # The joint adapter first concatenates its two sources: a tensor of their total size.
    assert net.adapters[key].source_shape[0] == sum(s[0] for s in net.adapters[key].source_shapes)
