"""Merging tap adapters on a column adopted from an ONNX file, checked against onnxruntime.

tests/test_tap_merge.py merges adapters that read a torch model's taps; here column 0 is
an ONNX model run by onnxruntime, so the taps a joint adapter bridges are onnxruntime's
values. References, each named beside its check: onnxruntime itself, in a session this
test builds with onnx's own helper (the graph's tap values added as outputs), for the
taps; torch's functional ops (``F.interpolate``, ``F.adaptive_avg_pool2d``, ``F.conv2d``,
``F.linear``) on those taps for the sum a full-rank merge must reproduce; onnxruntime
running the exported file, against the adopted model run alone in onnxruntime (bit for
bit) and against the workspace's forward (within the stated ONNX tolerance).
"""

from __future__ import annotations

import io
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
import torch.nn.functional as F
import yaml
from adopt_helpers import small_cnn

import colonnade
from colonnade.cli import main
from colonnade.evidence.artifact import ONNX_TOLERANCE
from colonnade.files.runtime import RUN_BATCH
from colonnade.files.store import create, load
from colonnade.training.validation import store_validation
from colonnade.trimming import merge

SHAPE = (3, 16, 16)
# small_cnn's second convolution ([8, 4, 4]) and the pooling after it ([8, 1, 1]); the
# input has an odd name with a dynamic batch axis, as a model made elsewhere may have.
TAPS = ["/2/Conv_output_0", "/4/GlobalAveragePool_output_0"]
INPUT = "image:0"
LAYERS = {"block 1": ["c2_b1_from_c0", "c2_b1_from_c1"],  # a 4x4 tap upsampled into 8x8
          "block 2": ["c2_b2_from_c0", "c2_b2_from_c1"],  # a conv tap pooled into dense
          "head": ["h_b_from_c0", "h_b_from_c1"]}


def _onnx_file(tmp_path: Path) -> Path:
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(small_cnn(), (torch.zeros(2, *SHAPE),), buf, dynamo=False,
                          input_names=[INPUT], output_names=["scores"], opset_version=18,
                          dynamic_axes={INPUT: {0: "n"}, "scores": {0: "n"}})
    path = tmp_path / "inspect.onnx"
    path.write_bytes(buf.getvalue())
    return path


def _spec(tmp_path: Path) -> str:
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump({
        "input": list(SHAPE),
        "column": [{"conv2d": 4, "kernel": 3, "padding": 1}, {"act": "relu"},
                   {"conv2d": 4, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 8}],
        "lateral": {"kind": "linear"}, "train": {"epochs": 1}}))
    return str(path)


def _session(data: bytes) -> ort.InferenceSession:
    options = ort.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    return ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])


def _ort_taps(path: Path, x: torch.Tensor) -> dict[str, torch.Tensor]:
    """The taps as onnxruntime computes them: the graph's values made outputs by onnx's
    own helper, in a session of this test's making."""
    model = onnx.load(path)
    for tap in TAPS:
        model.graph.output.append(onnx.helper.make_tensor_value_info(
            tap, onnx.TensorProto.FLOAT, None))
    got = _session(model.SerializeToString()).run(TAPS, {INPUT: x.numpy()})
    return {tap: torch.from_numpy(v) for tap, v in zip(TAPS, got, strict=True)}


def _summed_by_torch(net, path: Path, keys: list[str], x: torch.Tensor) -> torch.Tensor:
    """The linear adapters' summed output from their weights with torch's functional ops:
    each tap from onnxruntime, the column's block output from the network's forward."""
    taps, total = _ort_taps(path, x), 0
    with torch.no_grad():
        outs = net.run_columns(x, [0, 1])
    for key in keys:
        info, ad = net.adapter_info[key], net.adapters[key]
        if "tap" in info.extra:
            h = taps[info.extra["tap_name"]]
            if len(ad.target_shape) == 1:  # pooled into a dense layer (or a head)
                total = total + F.linear(F.adaptive_avg_pool2d(h, 1).flatten(1), ad.U.weight)
            else:  # resampled to the block's positions, then a 1x1 convolution
                h = F.interpolate(h, size=tuple(ad.target_shape[1:]), mode="nearest")
                total = total + F.conv2d(h, ad.U.weight)
        else:
            h = outs[1][-1] if info.head is not None else outs[1][info.block - 1]
            total = total + (F.linear(h, ad.U.weight) if len(ad.target_shape) == 1 else
                             F.conv2d(h, ad.U.weight, stride=ad.U.stride,
                                      padding=ad.U.padding))
    return total.double()


def _joint_output(net, key: str, x: torch.Tensor) -> torch.Tensor:
    seen = {}
    handle = net.adapters[key].register_forward_hook(lambda m, i, o: seen.setdefault("y", o))
    with torch.no_grad():
        net(x, task="b")
    handle.remove()
    return seen["y"].double()


@pytest.fixture(scope="module")
def adopted(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("onnxtapmerge")
    path = _onnx_file(tmp_path)
    net = colonnade.adopt(str(path), SHAPE, "t", TAPS, _spec(tmp_path))
    for i, name in enumerate(["a", "b"]):
        net.add_column(name, 3, seed=i)
    net.freeze()
    return net, path, tmp_path


def test_onnx_tap_merges_reproduce_the_sum_onnxruntime_gives(adopted):
    net, path, _ = adopted
    assert net.adopted.record.runtime == "onnxruntime"
    x = torch.rand(70, *SHAPE, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        before = {t: net(x, task=t) for t in net.tasks}
    for layer, keys in LAYERS.items():
        want = _summed_by_torch(net, path, keys, x)
        fit = merge.fit_joint(net, "b", keys, x)
        assert fit.tap == TAPS.index(net.adapter_info[keys[0]].extra["tap_name"]), layer
        key, undo = merge.install_joint(net, fit, fit.full_rank)
        assert net.adapters[key].tap_shape is not None, layer
        # Full rank: exact in real arithmetic (linear in the bridged tap); 1e-5 is float32
        # rounding, the bound of tests/test_tap_merge.py and tests/test_trim.py.
        assert (_joint_output(net, key, x) - want).abs().max().item() <= 1e-5, layer
        with torch.no_grad():
            after = {t: net(x, task=t) for t in net.tasks}
        assert (after["b"] - before["b"]).abs().max().item() <= 1e-5, layer
        for t in ("t", "a"):  # they never read column 2: bit for bit
            assert torch.equal(after[t], before[t]), (layer, t)
        merge.uninstall_joint(net, undo)


def test_onnx_tap_merges_export_and_match_onnxruntime(adopted, capsys):
    net, path, tmp_path = adopted
    x = torch.rand(70, *SHAPE, generator=torch.Generator().manual_seed(1))
    for keys in LAYERS.values():  # every layer of task b merged, at full rank
        fit = merge.fit_joint(net, "b", keys, x)
        merge.install_joint(net, fit, fit.full_rank)
    g = torch.Generator().manual_seed(2)
    for task in net.tasks:  # what the export measures the file on
        store_validation(net, task, torch.rand(40, *SHAPE, generator=g),
                         torch.randint(0, net.task(task).classes, (40,), generator=g))
    ws = tmp_path / "ws"
    create(net.spec, ws, net)
    back = load(ws)
    joints = [k for k, a in back.adapter_info.items() if a.kind == "joint"]
    assert len(joints) == 3 and all(back.adapters[k].tap_shape is not None for k in joints)
    out = tmp_path / "all.onnx"
    assert main(["export", str(ws), "--all", "-o", str(out)]) == 0
    xs = x.numpy()
    shipped = _session(out.read_bytes())
    names = [o.name for o in shipped.get_outputs()]
    parts = [shipped.run(names, {"x": xs[i:i + RUN_BATCH]}) for i in range(0, len(xs), RUN_BATCH)]
    got = [np.concatenate(p) for p in zip(*parts, strict=True)]
    got = dict(zip(names, got, strict=True))
    alone = _session(path.read_bytes()).run(["scores"], {INPUT: xs})[0]
    assert np.array_equal(got["t"], alone)  # the adopted model run alone: bit for bit
    with torch.no_grad():
        want = back.forward_all(x)
    for task in ("a", "b"):
        assert np.abs(got[task] - want[task].numpy()).max() <= ONNX_TOLERANCE, task
    capsys.readouterr()
    assert main(["check", str(ws), "--artifact", str(out)]) == 0
