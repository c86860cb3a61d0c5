"""Tests written to fail on specific breakages: each names the change it would catch.

Outside references: ``torch.nn.functional`` written out by hand for Eq. 2 of Rusu et al.
2016 (Progressive Neural Networks, arXiv:1606.04671), forward hooks on the modules torch
actually calls, onnxruntime for the exported file, and IEEE 754 binary32 rounding for
the tolerances (unit roundoff 2**-24, about 6e-8).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from colonnade.cli import main
from colonnade.model.adapters import NonlinearAdapter
from colonnade.model.network import ProgressiveNet
from colonnade.model.schema import Conv1d, Dense
from colonnade.model.spec import parse_spec
from colonnade.training.cache import FrozenActivations
from colonnade.training.data import TaskData
from colonnade.trimming import trim as trim_module

# A few float32 additions in a different order: a few units of binary32 roundoff
# (2**-24 ~ 6e-8) relative to values of order 1; 1e-6 leaves room (our bound).
FLOAT32_ATOL = 1e-6


# ----------------------------------------------------------------------------- Eq. 2
@pytest.mark.parametrize("target,source,shape", [
    (Dense(dense=5), (6,), (6,)),
    (Conv1d(conv1d=4, kernel=3, padding=1), (3, 9), (4, 9)),
])
def test_nonlinear_adapter_applies_its_scalar(target, source, shape):
    """Breakage caught: the learned scalar alpha of Eq. 2 ignored in the forward pass."""
    torch.manual_seed(0)
    adapter = NonlinearAdapter(source, shape, target, reduce=0.5, activation="relu")
    with torch.no_grad():
        adapter.alpha.fill_(0.37)
    h = torch.randn(7, *source)
    # Source: Eq. 2, U sigma(V alpha h), written with torch.nn.functional.
    if isinstance(target, Dense):
        want = F.linear(F.relu(F.linear(0.37 * h, adapter.V.weight)), adapter.U.weight)
    else:
        v = F.conv1d(0.37 * h, adapter.V.weight)
        want = F.conv1d(F.relu(v), adapter.U.weight, padding=1)
    with torch.no_grad():
        got = adapter(h)
    assert torch.allclose(got, want, atol=FLOAT32_ATOL, rtol=0)
    assert not torch.allclose(got, adapter.U(F.relu(adapter.V(h))), atol=1e-3)


def test_network_forward_uses_the_scalar():
    """Breakage caught: alpha ignored anywhere on the network's path: at alpha = 0 the
    adapter's output is exactly zero (bias-free maps, relu(0) = 0), so the logits must
    equal the network's with that adapter taken out."""
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec({"input": [6], "column": [{"dense": 8}, {"act": "relu"},
                                                              {"dense": 5}],
                                     "lateral": {"kind": "nonlinear"}}))
    net.add_column("a", 3, seed=0)
    net.add_column("b", 3, seed=1)
    net.freeze()
    x = torch.randn(9, 6)
    with torch.no_grad():
        for key in ("c1_b1_from_c0", "h_b_from_c0"):
            net.adapters[key].alpha.zero_()
        zeroed = net(x, task="b")
        net.retire_adapters(["c1_b1_from_c0", "h_b_from_c0"], "pruned", "prune")
        without = net(x, task="b")
    assert torch.equal(zeroed, without)


# ----------------------------------------------------------------------------- bias fold
def _grown_for_trim():
    torch.manual_seed(0)
    spec = parse_spec({"input": [6], "column": [{"dense": 8}, {"act": "relu"}, {"dense": 7},
                                                {"act": "tanh"}],
                       "lateral": {"kind": "linear"}})
    net = ProgressiveNet(spec)
    net.add_column("a", 3, seed=0)
    net.add_column("b", 3, seed=1)
    net.freeze()
    with torch.no_grad():  # adapters with a clear mean, so a lost fold shows
        for key in ("c1_b1_from_c0", "h_b_from_c0"):
            net.adapters[key].U.weight.add_(0.3)
    g = torch.Generator().manual_seed(1)
    x = torch.rand(64, 6, generator=g) + 0.5
    y = torch.randint(0, 3, (64,), generator=g)
    return net, TaskData(x, y, x[:0], y[:0], 3, "memory")


def test_pruned_adapter_mean_goes_into_the_bias_with_its_sign():
    """Breakage caught: the bias fold of a pruned adapter skipped, or subtracted."""
    net, data = _grown_for_trim()
    targets = {"c1_b1_from_c0": net.columns[1].blocks[1].weighted, "h_b_from_c0": net.heads["b"]}
    means: dict[str, torch.Tensor] = {}
    # Source: the adapters' real outputs on the data, caught by forward hooks.
    handles = [net.adapters[k].register_forward_hook(
        lambda m, i, o, k=k: means.__setitem__(k, o.mean(0))) for k in targets]
    with torch.no_grad():
        net(data.x, task="b")
    for h in handles:
        h.remove()
    before = {k: layer.bias.detach().clone() for k, layer in targets.items()}
    report = trim_module.trim(net, "b", data, max_drop=100.0)
    folded = {s.adapters[0] for s in report.steps
              if s.step == "adapter_pruned" and s.detail["mean_folded_into_bias"]}
    assert folded == set(targets)
    for key, layer in targets.items():
        assert torch.allclose(layer.bias - before[key], means[key], atol=FLOAT32_ATOL, rtol=0)


# ----------------------------------------------------------------------------- export
POOL_SPEC = """name: strided-pool
input: [2, 24]
column:
  - {conv1d: 4, kernel: 3}
  - {act: relu}
  - {pool: max, size: 3, stride: 1}
  - {conv1d: 3, kernel: 3}
  - {pool: avg, size: 2, stride: 1}
  - {flatten: true}
  - {dense: 5}
lateral: {kind: nonlinear}
train: {epochs: 1, batch_size: 16}
"""


def test_exported_pools_keep_their_stride(tmp_path):
    """Breakage caught: an exported pool whose stride differs from its size loses it."""
    pytest.importorskip("onnxruntime")
    import onnxruntime

    from colonnade.files.standalone import load_task
    from colonnade.files.store import load

    (tmp_path / "spec.yaml").write_text(POOL_SPEC)
    g = np.random.default_rng(0)
    np.savez(tmp_path / "d.npz", x=g.normal(size=(40, 2, 24)).astype(np.float32),
             y=g.integers(0, 2, 40))
    ws = tmp_path / "ws"
    assert main(["new", str(tmp_path / "spec.yaml"), "-o", str(ws)]) == 0
    for task in ("a", "b"):
        assert main(["grow", str(ws), "--task", task, "--train", str(tmp_path / "d.npz"),
                     "--quiet"]) == 0
    net = load(ws)
    x = torch.from_numpy(g.normal(size=(6, 2, 24)).astype(np.float32))
    with torch.no_grad():
        want = net(x, task="b")
    assert main(["export", str(ws), "--task", "b", "-o", str(tmp_path / "b.pt")]) == 0
    model, _ = load_task(tmp_path / "b.pt")
    with torch.no_grad():
        assert torch.equal(model(x), want)
    assert main(["export", str(ws), "--task", "b", "-o", str(tmp_path / "b.onnx")]) == 0
    session = onnxruntime.InferenceSession(str(tmp_path / "b.onnx"),
                                           providers=["CPUExecutionProvider"])
    # Source: onnxruntime, another runtime; float32 rounding between runtimes.
    got = session.run(None, {session.get_inputs()[0].name: x.numpy()})[0]
    np.testing.assert_allclose(got, want.numpy(), atol=1e-5, rtol=1e-5)


# ----------------------------------------------------------------------------- cache
def test_cache_last_chunk_is_full():
    """Breakage caught: the cache computing its last chunk with fewer rows than the
    training batch (the chunks must all be full, the last overlapping the one before)."""
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec({"input": [6], "column": [{"dense": 8}, {"act": "relu"},
                                                              {"dense": 5}],
                                     "lateral": {"kind": "linear"}}))
    net.add_column("a", 3, seed=0)
    net.add_column("b", 3, seed=1)
    seen: list[int] = []
    # Source: forward hooks on the layer the cache's forward really calls.
    handle = net.columns[0].blocks[0].weighted.register_forward_hook(
        lambda m, i, o: seen.append(i[0].shape[0]))
    x = torch.randn(10, 6)
    cache = FrozenActivations(net, "b", x, chunk=4, cap_bytes=1 << 20, full_last=True)
    handle.remove()
    assert seen == [4, 4, 4]
    with torch.no_grad():
        whole = net.run_columns(x, [0])[0]
    for b, out in enumerate(cache.rows(slice(0, 10))[0]):
        if out is not None:
            assert torch.allclose(out, whole[b], atol=FLOAT32_ATOL, rtol=0)
    cache.close()
