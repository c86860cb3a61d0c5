"""Projected paths against growing for real, in every combination of growth mode, the
network's own lateral kind, the what-if lateral kind, and a trimmed existing network.

Outside references: ``numel()`` over the parameters of the modules torch actually calls
(forward hooks) and torch.utils.flop_counter.FlopCounterMode over the real forward.
"""

from __future__ import annotations

import copy

import pytest
import torch
from conftest import called_params, flop_macs

from colonnade.costing import sizing
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

SPEC = {"name": "proj", "input": [2, 16],
        "column": [{"conv1d": 4, "kernel": 3}, {"act": "relu"}, {"conv1d": 6, "kernel": 3,
                   "stride": 2}, {"norm": "batch"}, {"act": "relu"}, {"pool": "global_avg"},
                   {"dense": 5}, {"act": "relu"}]}


def _start(own: str, trimmed: bool) -> ProgressiveNet:
    raw = dict(SPEC, lateral={"kind": own})
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(raw))
    for k in range(3):
        net.add_column(f"t{k}", 3, seed=k)
        net.freeze()
    if trimmed and own != "none":
        # As a trim leaves it: column 2 reads column 1 through block 1 only.
        gone = [k for k, a in net.adapter_info.items()
                if (a.column == 2 or a.head == "t2") and k != "c2_b1_from_c1"]
        net.retire_adapters(gone, "pruned", "prune")
    return net.eval()


@pytest.mark.parametrize("trimmed", [False, True])
@pytest.mark.parametrize("own", ["none", "linear", "nonlinear"])
@pytest.mark.parametrize("whatif", ["none", "linear", "nonlinear"])
@pytest.mark.parametrize("mode", ["column", "head"])
def test_projection_equals_growing_for_real(mode, whatif, own, trimmed):
    net = _start(own, trimmed)
    lateral = net.spec.lateral.model_copy(update={"kind": whatif})
    proj = sizing.project(net, 2, mode=mode, classes=4, lateral=lateral)
    real = copy.deepcopy(net)
    real.spec = real.spec.model_copy(update={"lateral": lateral})
    x = torch.randn(1, *net.input_shape)
    for p in proj.tasks:
        before = {id(q) for q in real.parameters()}
        if mode == "column":
            real.add_column(p.task, 4, seed=0)
        else:
            real.add_head(p.task, 4, on=real.column_info[-1].task, seed=0)
        real.freeze()
        real.eval()
        # Sources: numel() of the new modules and of the modules the forward calls
        # (forward hooks); FlopCounterMode over the real forward.
        assert p.added.params == sum(q.numel() for q in real.parameters()
                                     if id(q) not in before)
        assert p.path.params == called_params(real, lambda t=p.task: real(x, task=t))
        assert p.path.macs == flop_macs(lambda t=p.task: real(x, task=t))
