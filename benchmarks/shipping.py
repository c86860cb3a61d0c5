"""Benchmark 5: artifacts as they ship, in onnxruntime with one thread.

(a) the twelve-task network as one all-task artifact against twelve single-task
    artifacts, run one after another, at batch 1 and 64; the ideal is the ratio of MAC
    counts (the twelve closures, summed, over one pass of every column), counted by
    torch.utils.flop_counter.FlopCounterMode;
(b) the all-task artifact in int8 (onnxruntime static quantisation, QDQ) against
    float32 at batch 1 and 64, and the file sizes; the ideal for both is the element
    width, 4 B against 1 B.

The network is the demo's template (specs/pump_spectra.yaml: dense 128-64, nonlinear
laterals) grown to twelve columns with seeded random weights: timings and sizes depend
on shapes, not on trained values. Calibration rows are seeded normal noise.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
import yaml
from torch.utils.flop_counter import FlopCounterMode

from colonnade.files.artifact import artifact_blob, artifact_model
from colonnade.files.onnx_export import onnx_bytes
from colonnade.files.quantize import quantize_int8
from colonnade.files.runtime import onnx_runner
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

__all__ = ["bench_shipping"]

SPEC = Path(__file__).resolve().parents[1] / "specs" / "pump_spectra.yaml"


def _least(fn: Callable[[], object], rounds: int, repeat: int) -> float:
    fn()
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        for _ in range(repeat):
            fn()
        best = min(best, (time.perf_counter() - start) / repeat)
    return best


def _pair(a: Callable[[], object], b: Callable[[], object], rounds: int, repeat: int,
          ) -> tuple[float, float]:
    """Least time of a and of b over alternating rounds (see run.py's side_by_side)."""
    ta, tb = [], []
    a()
    b()
    for _ in range(rounds):
        ta.append(_least(a, 1, repeat))
        tb.append(_least(b, 1, repeat))
    return min(ta), min(tb)


def _macs(fn: Callable[[], object]) -> int:
    with FlopCounterMode(display=False) as counter:
        fn()
    return counter.get_total_flops() // 2


def _onnx(net: ProgressiveNet, tasks: list[str]) -> bytes:
    blob = artifact_blob(net, tasks)
    return onnx_bytes(artifact_model(blob), list(net.input_shape), blob["meta"])


def bench_shipping(quick: bool, verdict: Callable[[bool], str]) -> None:
    n_tasks = 6 if quick else 12
    net = ProgressiveNet(parse_spec(yaml.safe_load(SPEC.read_text())))
    for t in range(n_tasks):
        net.add_column(f"task{t + 1}", 5, seed=t)
    net.freeze()
    start = time.perf_counter()
    every = _onnx(net, net.tasks)
    singles = [_onnx(net, [t]) for t in net.tasks]
    calib = np.random.default_rng(0).normal(size=(512, *net.input_shape)).astype(np.float32)
    int8 = quantize_int8(every, calib)
    print(f"  ({n_tasks} tasks; exporting {n_tasks + 1} files and quantising one took "
          f"{time.perf_counter() - start:.0f} s)")
    run_all, run_q = onnx_runner(every, 1), onnx_runner(int8, 1)
    run_one = [onnx_runner(b, 1) for b in singles]
    x1 = torch.randn(1, *net.input_shape)
    with torch.no_grad():
        separate = sum(_macs(lambda t=t: net(x1, task=t)) for t in net.tasks)
        joint = _macs(lambda: net.forward_all(x1))
    rounds, reps = (3, 20) if quick else (5, 50)
    for batch in (1, 64):
        x = np.random.default_rng(batch).normal(size=(batch, *net.input_shape)).astype(
            np.float32)
        t_one, t_all = _pair(lambda x=x: [r.run_batch(x) for r in run_one],
                             lambda x=x: run_all.run_batch(x), rounds, max(2, reps // 4))
        ratio, ideal = t_one / t_all, separate / joint
        print(f"  batch {batch}: {n_tasks} single-task artifacts {1e3 * t_one:.3f} ms, one "
              f"all-task artifact {1e3 * t_all:.3f} ms: {ratio:.2f}x (ideal from MACs "
              f"{ideal:.2f}x; {verdict(ratio >= 2.0)}: >= 2x)")
    for batch in (1, 64):
        x = np.random.default_rng(batch).normal(size=(batch, *net.input_shape)).astype(
            np.float32)
        t_f, t_q = _pair(lambda x=x: run_all.run_batch(x), lambda x=x: run_q.run_batch(x), rounds,
                         reps)
        goal = f"{verdict(t_f / t_q >= 1.5)}: >= 1.5x" if batch == 1 else "no goal"
        print(f"  batch {batch}: float32 {1e3 * t_f:.3f} ms, int8 {1e3 * t_q:.3f} ms: "
              f"{t_f / t_q:.2f}x (ideal from element width 4x; {goal})")
    size = len(int8) / len(every)
    print(f"  file size: float32 {len(every):,} B, int8 {len(int8):,} B: {size:.2f}x (ideal "
          f"0.25x; {verdict(size <= 0.3)}: <= 0.3x); {n_tasks} single-task files "
          f"{sum(map(len, singles)):,} B")
