"""Benchmark 5: artifacts as they ship, in onnxruntime with one thread.

(a) the demo's template grown to twelve tasks as one all-task artifact against twelve
    single-task artifacts, run one after another, at batch 1 and 64; the ideal is the
    ratio of MAC counts (the twelve closures, summed, over one pass of every column),
    counted by torch.utils.flop_counter.FlopCounterMode. The twelve single-task files
    are cut from the all-task file with onnx's own ``onnx.utils.Extractor`` (the nodes
    that one task's output depends on: its closure), which takes a second where twelve
    more exports took most of a minute; the benchmark checks on task 1 that a real
    single-task export holds the same operators and gives the same outputs;
(b) int8 (colonnade's settings, files/quantize.py) against float32 at batch 1 and 64,
    and the file sizes, on two networks: the demo's template (dense 128-64, nonlinear
    laterals, twelve tasks) and a wide one (dense 512-256 with batch norm, nonlinear
    laterals, four tasks). The ideal for both is the element width, 4 B against 1 B.
    Beside each it prints the operators onnxruntime runs after its own graph
    optimisation and the multiply-accumulates per operator: where an operator does
    little work, its fixed cost per call (and the int8 graph's extra quantise and
    dequantise steps) outweighs what int8 arithmetic saves;
(c) with ``--int8-variants``: the same for three standard alternatives to colonnade's
    settings (quantising only MatMul/Gemm/Conv; onnxruntime's QOperator format, with and
    without that restriction), to show why the settings are what they are.

Weights are seeded random: timings and sizes depend on shapes, not on trained values.
Calibration rows are seeded normal noise.
"""

from __future__ import annotations

import collections
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import onnx
import torch
import yaml
from torch.utils.flop_counter import FlopCounterMode

from colonnade.files.artifact import artifact_blob, artifact_model
from colonnade.files.onnx_export import onnx_bytes
from colonnade.files.quantize import quantize_int8, size_breakdown
from colonnade.files.runtime import onnx_runner
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

__all__ = ["bench_shipping"]

SPEC = Path(__file__).resolve().parents[1] / "specs" / "pump_spectra.yaml"
WIDE = {"name": "wide", "input": [512],
        "column": [{"dense": 512}, {"norm": "batch"}, {"act": "relu"}, {"dense": 256},
                   {"act": "relu"}],
        "lateral": {"kind": "nonlinear", "reduce": 0.5}, "train": {"epochs": 1}}


def _least(fn: Callable[[], object], repeat: int) -> float:
    start = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - start) / repeat


def _pair(a: Callable[[], object], b: Callable[[], object], rounds: int, repeat: int,
          ) -> tuple[float, float]:
    """Least time of a and of b over alternating rounds (see run.py's side_by_side)."""
    ta, tb = [], []
    a()
    b()
    for _ in range(rounds):
        ta.append(_least(a, repeat))
        tb.append(_least(b, repeat))
    return min(ta), min(tb)


def _macs(fn: Callable[[], object]) -> int:
    with FlopCounterMode(display=False) as counter:
        fn()
    return counter.get_total_flops() // 2


def _grown(raw: dict, tasks: int) -> ProgressiveNet:
    net = ProgressiveNet(parse_spec(raw))
    for t in range(tasks):
        net.add_column(f"task{t + 1}", 5, seed=t)
    net.freeze()
    return net


def _onnx(net: ProgressiveNet, tasks: list[str]) -> bytes:
    blob = artifact_blob(net, tasks)
    return onnx_bytes(artifact_model(blob), list(net.input_shape), blob["meta"])


def _cut(every: bytes, task: str) -> bytes:
    """The all-task model cut down to one task's output: the nodes it depends on."""
    model = onnx.load_from_string(every)
    return onnx.utils.Extractor(model).extract_model(["x"], [task]).SerializeToString()


def _ops(data: bytes) -> collections.Counter:
    return collections.Counter(n.op_type for n in onnx.load_from_string(data).graph.node)


def _optimised_ops(data: bytes) -> int:
    """Operators onnxruntime runs: the graph after its own optimisation (fusions)."""
    import onnxruntime as ort

    with tempfile.TemporaryDirectory() as tmp:
        options = ort.SessionOptions()
        options.intra_op_num_threads = 1
        options.optimized_model_filepath = str(Path(tmp) / "optimised.onnx")
        options.log_severity_level = 3
        ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
        return len(onnx.load(options.optimized_model_filepath).graph.node)


def _batch(net: ProgressiveNet, batch: int) -> np.ndarray:
    return np.random.default_rng(batch).normal(size=(batch, *net.input_shape)).astype(
        np.float32)


def _singles(net: ProgressiveNet, every: bytes, verdict: Callable[[bool], str],
             rounds: int, reps: int) -> None:
    start = time.perf_counter()
    singles = [_cut(every, t) for t in net.tasks]
    cut_s = time.perf_counter() - start
    real = _onnx(net, [net.tasks[0]])
    x = _batch(net, 64)
    same_ops = _ops(real) == _ops(singles[0])
    same_out = np.allclose(onnx_runner(real, 1).run_batch(x)[0],
                           onnx_runner(singles[0], 1).run_batch(x)[0], rtol=0, atol=1e-6)
    print(f"  twelve single-task files cut from the all-task file in {cut_s:.1f} s; task 1 "
          f"cut against its real export: operators {'the same' if same_ops else 'DIFFER'}, "
          f"outputs {'agree within 1e-6' if same_out else 'DIFFER'}")
    run_all = onnx_runner(every, 1)
    run_one = [onnx_runner(b, 1) for b in singles]
    x1 = torch.randn(1, *net.input_shape)
    with torch.no_grad():
        separate = sum(_macs(lambda t=t: net(x1, task=t)) for t in net.tasks)
        joint = _macs(lambda: net.forward_all(x1))
    for batch in (1, 64):
        x = _batch(net, batch)
        t_one, t_all = _pair(lambda x=x: [r.run_batch(x) for r in run_one],
                             lambda x=x: run_all.run_batch(x), rounds, max(2, reps // 4))
        ratio, ideal = t_one / t_all, separate / joint
        print(f"  batch {batch}: {len(singles)} single-task artifacts {1e3 * t_one:.3f} ms, "
              f"one all-task artifact {1e3 * t_all:.3f} ms: {ratio:.2f}x (ideal from MACs "
              f"{ideal:.2f}x; {verdict(ratio >= 2.0)}: >= 2x)")


def _int8_row(label: str, net: ProgressiveNet, every: bytes, int8: bytes,
              verdict: Callable[[bool], str], rounds: int, reps: int) -> None:
    run_f, run_q = onnx_runner(every, 1), onnx_runner(int8, 1)
    x1 = torch.randn(1, *net.input_shape)
    with torch.no_grad():
        macs = _macs(lambda: net.forward_all(x1))
    ops_f, ops_q = _optimised_ops(every), _optimised_ops(int8)
    print(f"  {label}: {macs:,} MACs a sample; onnxruntime runs {ops_f} operators in "
          f"float32 ({macs // ops_f:,} MACs each), {ops_q} in int8")
    for batch in (1, 64):
        x = _batch(net, batch)
        t_f, t_q = _pair(lambda x=x: run_f.run_batch(x), lambda x=x: run_q.run_batch(x),
                         rounds, reps if batch == 1 else max(2, reps // 4))
        goal = f"{verdict(t_f / t_q >= 1.5)}: >= 1.5x" if batch == 1 else "no goal"
        print(f"    batch {batch}: float32 {1e3 * t_f:.3f} ms, int8 {1e3 * t_q:.3f} ms: "
              f"{t_f / t_q:.2f}x (ideal from element width 4x; {goal}); an operator "
              f"{1e6 * t_f / ops_f:.2f} us in float32, {1e6 * t_q / ops_q:.2f} us in int8")
    size = len(int8) / len(every)
    parts = size_breakdown(int8)
    print(f"    file size: float32 {len(every):,} B, int8 {len(int8):,} B: {size:.2f}x (ideal "
          f"0.25x; {verdict(size <= 0.3)}: <= 0.3x); the int8 file holds int8 weights "
          f"{parts['int8_weights']:,} B, int32 biases {parts['int32_biases']:,} B, scales and "
          f"zero points {parts['scales'] + parts['zero_points']:,} B, float tensors "
          f"{parts['float_tensors']:,} B, graph and names {parts['graph_and_metadata']:,} B")


def _variants(net: ProgressiveNet, every: bytes, calib: np.ndarray, rounds: int,
              reps: int) -> None:
    """Three standard alternatives to colonnade's quantisation settings, side by side."""
    from onnxruntime.quantization import (
        CalibrationDataReader,
        QuantFormat,
        QuantType,
        quantize_static,
    )
    from onnxruntime.quantization.shape_inference import quant_pre_process

    class _Rows(CalibrationDataReader):
        def __init__(self) -> None:
            self.it = iter([{"x": calib[i:i + 64]} for i in range(0, len(calib), 64)])

        def get_next(self) -> dict | None:
            return next(self.it, None)

    def quant(fmt: object, ops: list[str] | None) -> bytes:
        with tempfile.TemporaryDirectory() as tmp:
            src, pre, out = (Path(tmp) / n for n in ("f.onnx", "p.onnx", "q.onnx"))
            src.write_bytes(every)
            quant_pre_process(str(src), str(pre))
            quantize_static(str(pre), str(out), _Rows(), quant_format=fmt, per_channel=True,
                            activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8,
                            op_types_to_quantize=ops)
            return out.read_bytes()

    gemm = ["MatMul", "Gemm", "Conv"]
    run_f = onnx_runner(every, 1)
    for label, data in (("QDQ, MatMul/Gemm/Conv only", quant(QuantFormat.QDQ, gemm)),
                        ("QOperator, every operator", quant(QuantFormat.QOperator, None)),
                        ("QOperator, MatMul/Gemm/Conv only",
                         quant(QuantFormat.QOperator, gemm))):
        run_q = onnx_runner(data, 1)
        line = f"    {label}: size {len(data) / len(every):.2f}x"
        for batch in (1, 64):
            x = _batch(net, batch)
            t_f, t_q = _pair(lambda x=x: run_f.run_batch(x),
                             lambda x=x, r=run_q: r.run_batch(x),
                             rounds, reps if batch == 1 else max(2, reps // 4))
            line += f"; batch {batch} {t_f / t_q:.2f}x"
        print(line)


def bench_shipping(quick: bool, verdict: Callable[[bool], str],
                   int8_variants: bool = False) -> None:
    rounds, reps = (3, 20) if quick else (5, 40)
    start = time.perf_counter()
    demo = _grown(yaml.safe_load(SPEC.read_text()), 12)
    every = _onnx(demo, demo.tasks)
    print(f"  (the all-task file of twelve tasks exported in {time.perf_counter() - start:.0f} s)")
    _singles(demo, every, verdict, rounds, reps)
    calib = np.random.default_rng(0).normal(size=(512, *demo.input_shape)).astype(np.float32)
    _int8_row("demo template, dense 128-64, 12 tasks", demo, every,
              quantize_int8(every, calib), verdict, rounds, reps)
    if int8_variants:
        _variants(demo, every, calib, rounds, reps)
    wide = _grown(WIDE, 4)
    wide_every = _onnx(wide, wide.tasks)
    calib = np.random.default_rng(0).normal(size=(512, *wide.input_shape)).astype(np.float32)
    _int8_row("wide, dense 512-256 with batch norm, 4 tasks", wide, wide_every,
              quantize_int8(wide_every, calib), verdict, rounds, reps)
    if int8_variants:
        _variants(wide, wide_every, calib, rounds, reps)
