"""Block-level closures: a task's closure holds only the column blocks a live path reaches.

Outside references: forward hooks on the modules torch actually calls for ``net(x,
task=...)`` (what the task really runs), torch.utils.flop_counter.FlopCounterMode and
``numel()`` over those modules, and the logits themselves (a tensor outside the
closure, changed, leaves them bit-identical; one inside it moves them).
"""

from __future__ import annotations

import copy

import pytest
import torch
from conftest import called_tensors, flop_macs  # forward hooks; FlopCounterMode FLOPs / 2

from colonnade.costing import costs
from colonnade.evidence.seal import Probe, entry_digest, seal_task
from colonnade.evidence.verify import check_net
from colonnade.model.digest import closure_digests
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

SPEC = {"name": "blocks", "input": [6],
        "column": [{"dense": 8}, {"act": "relu"}, {"dense": 7}, {"norm": "batch"},
                   {"act": "relu"}, {"dense": 5}, {"act": "tanh"}],
        "lateral": {"kind": "nonlinear"}}


def _trimmed_net() -> ProgressiveNet:
    """t2 on column 2 reads column 1 only through block 0 (as after a trim)."""
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(SPEC))
    for k in range(3):
        net.add_column(f"t{k}", 3, seed=k)
        net.freeze()
    keep = "c2_b1_from_c1"
    gone = [k for k, a in net.adapter_info.items()
            if (a.column == 2 or a.head == "t2") and k != keep]
    net.retire_adapters(gone, "pruned", "prune")
    return net.eval()


def test_closure_is_what_forward_runs():
    net = _trimmed_net()
    x = torch.randn(4, 6)
    closure = net.closure("t2")
    assert closure.columns == (1, 2)
    assert closure.depth(1) == 1 and closure.is_partial(1)
    # Source: forward hooks on the modules torch calls for this task.
    ran = called_tensors(net, lambda: net(x, task="t2"))
    assert set(net.closure_state("t2")) == ran
    assert not any(k.startswith("columns.1.blocks.1.") for k in ran)
    for task in ("t0", "t1"):
        assert set(net.closure_state(task)) == called_tensors(net, lambda t=task: net(x, task=t))


def influencing(net: ProgressiveNet, task: str, x: torch.Tensor) -> set[str]:
    """Floating tensors whose change moves the task's logits (the logits as reference)."""
    with torch.no_grad():
        before = net(x, task=task)
        out = set()
        for key, value in net.state_dict().items():
            if value.is_floating_point():
                other = copy.deepcopy(net)
                other.state_dict()[key].add_(0.5)
                if not torch.equal(other(x, task=task), before):
                    out.add(key)
    return out


def _floats(net, keys):
    state = net.state_dict()
    return {k for k in keys if state[k].is_floating_point()}


def test_tensors_outside_the_closure_do_not_move_the_logits():
    net = _trimmed_net()
    x = torch.randn(16, 6)
    # Source: the logits themselves, bit for bit.
    assert _floats(net, net.closure_state("t2")) == influencing(net, "t2", x)


def test_costs_follow_the_smaller_path():
    net = _trimmed_net()
    x = torch.randn(1, 6)
    cost = costs.task_cost(net, "t2").path
    ran = called_tensors(net, lambda: net(x, task="t2"))
    params = dict(net.named_parameters())
    # Sources: numel() over the parameters of called modules; FlopCounterMode's count.
    assert cost.params.total == sum(params[k].numel() for k in ran if k in params)
    assert cost.macs == flop_macs(lambda: net(x, task="t2"))
    whole = sum(p.numel() for n, p in net.named_parameters() if n.startswith("columns.1."))
    assert cost.params.column < whole + sum(
        p.numel() for n, p in net.named_parameters() if n.startswith("columns.2."))


def _probe(net, task, n=20):
    g = torch.Generator().manual_seed(3)
    return Probe(torch.randn(n, 6, generator=g), torch.randint(0, 3, (n,), generator=g),
                 "0" * 64, "probe.npz")


def _as_definition_1(net, entry):
    """The entry an earlier colonnade wrote: whole-column closure, no definition field."""
    old = copy.deepcopy(entry)
    whole, per = closure_digests(net.closure_state(old["task"], 1))
    c1 = net.closure(old["task"], 1)
    old["closure"] = {"sha256": whole, "columns": list(c1.columns),
                      "adapters": list(c1.adapters), "head": c1.head, "tensors": per}
    old["entry_sha256"] = entry_digest(old)
    return old


def test_old_seals_verify_by_their_own_definition():
    net = _trimmed_net()
    probe = _probe(net, "t2")
    entry = seal_task(net, "t2", probe)
    assert entry["closure"]["definition"] == 2
    net.meta["seals"]["t2"][-1] = _as_definition_1(net, entry)
    report = check_net(net, {"t2": probe})
    assert [t.verdict for t in report.tasks] == ["exact"]
    # A tensor in the whole column but outside the blocks t2 runs: the old seal covered
    # it, so by its definition it moved; a new seal does not cover it.
    with torch.no_grad():
        net.columns[1].blocks[1].weighted.weight.add_(1.0)
    report = check_net(net, {"t2": probe})
    assert report.tasks[0].verdict == "moved"
    assert "columns.1.blocks.1.weighted.weight" in " ".join(report.tasks[0].failures)
    net.meta["seals"]["t2"][-1] = entry
    assert check_net(net, {"t2": probe}).tasks[0].verdict == "exact"


def test_export_holds_only_the_blocks_the_task_runs():
    from colonnade.files.artifact import artifact_blob, artifact_model

    net = _trimmed_net()
    blob = artifact_blob(net, ["t2"])
    x = torch.randn(8, 6)
    assert _floats(net, blob["state"]) == influencing(net, "t2", x)
    model = artifact_model(blob)
    with torch.no_grad():
        assert torch.equal(model(x)[0], net(x, task="t2"))


@pytest.mark.parametrize("task", ["t2"])
def test_draw_fades_blocks_outside_the_closure(task):
    from colonnade.views.draw import to_dot

    net = _trimmed_net()
    source = to_dot(net, task=task).source
    # Column 1's block 0 is in focus, its blocks 1 and 2 are faded.
    line = next(ln for ln in source.splitlines() if ln.strip().startswith("c1_b0_0 "))
    assert "focus" in line
    for n in ("c1_b1_0", "c1_b2_0"):
        line = next(ln for ln in source.splitlines() if ln.strip().startswith(f"{n} "))
        assert "faded" in line


def test_export_checks_an_old_seal_by_its_own_definition():
    """Export compares the task with its seal; a seal made under the whole-column
    definition is compared by that definition, so it exports, and refuses once a tensor
    only that definition covers has changed."""
    from colonnade.errors import SealedError
    from colonnade.files.artifact import artifact_blob

    net = _trimmed_net()
    entry = seal_task(net, "t2", _probe(net, "t2"))
    net.meta["seals"]["t2"][-1] = _as_definition_1(net, entry)
    blob = artifact_blob(net, ["t2"])
    assert "columns.1.blocks.1.weighted.weight" not in blob["state"]
    with torch.no_grad():
        net.columns[1].blocks[1].weighted.weight.add_(1.0)
    with pytest.raises(SealedError):
        artifact_blob(net, ["t2"])
