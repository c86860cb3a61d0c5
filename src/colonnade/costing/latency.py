"""Latency measured on this machine: median of repeated timed calls, with the spread.

Measured, not derived, so it is reported beside the shape-derived costs and never
asserted on in tests. One call is timed at a time with ``time.perf_counter`` after a
few untimed warm-up calls (first calls pay for allocation and kernel selection); the
median is robust to the odd scheduler hiccup, the quartiles and extremes show the
spread. On CUDA each call is synchronised so the time covers the kernels.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass

import torch

from ..model.network import ProgressiveNet

__all__ = ["Latency", "time_calls", "task_latency", "all_tasks_latency", "BATCHES"]

BATCHES = (1, 64)


@dataclass(frozen=True)
class Latency:
    """Milliseconds per call at one batch size."""

    batch: int
    repeats: int
    median: float
    q1: float
    q3: float
    min: float
    max: float
    threads: int
    device: str

    def to_dict(self) -> dict[str, float | int | str]:
        return asdict(self)


def _quantile(sorted_ms: list[float], q: float) -> float:
    # Linear interpolation between closest ranks (numpy's default "linear" method).
    pos = (len(sorted_ms) - 1) * q
    lo = int(pos)
    hi = min(lo + 1, len(sorted_ms) - 1)
    return sorted_ms[lo] + (sorted_ms[hi] - sorted_ms[lo]) * (pos - lo)


def time_calls(fn: Callable[[], object], repeats: int, warmup: int = 3,
               sync: Callable[[], None] | None = None) -> list[float]:
    """Milliseconds of ``repeats`` calls of ``fn`` after ``warmup`` untimed ones."""
    for _ in range(warmup):
        fn()
    if sync:
        sync()
    out = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        if sync:
            sync()
        out.append((time.perf_counter() - start) * 1000.0)
    return out


def _measure(net: ProgressiveNet, call: Callable[[torch.Tensor], object], batch: int,
             repeats: int) -> Latency:
    device = net.device
    dtype = next((p.dtype for p in net.parameters() if p.is_floating_point()), torch.float32)
    x = torch.randn((batch, *net.input_shape), generator=torch.Generator().manual_seed(0),
                    dtype=dtype).to(device)
    sync = torch.cuda.synchronize if device.type == "cuda" else None
    was_training = net.training
    net.eval()
    try:
        with torch.inference_mode():
            ms = sorted(time_calls(lambda: call(x), repeats, sync=sync))
    finally:
        net.train(was_training)
    return Latency(batch, repeats, statistics.median(ms), _quantile(ms, 0.25),
                   _quantile(ms, 0.75), ms[0], ms[-1], torch.get_num_threads(), str(device))


def task_latency(net: ProgressiveNet, task: str, repeats: int = 20,
                 batches: tuple[int, ...] = BATCHES) -> dict[int, Latency]:
    """``net(x, task=task)`` timed at each batch size."""
    net.task(task)
    return {b: _measure(net, lambda x: net(x, task=task), b, repeats) for b in batches}


def all_tasks_latency(net: ProgressiveNet, repeats: int = 20,
                      batches: tuple[int, ...] = BATCHES) -> dict[int, Latency]:
    """``net.forward_all(x)`` timed at each batch size: every task in one pass."""
    return {b: _measure(net, net.forward_all, b, repeats) for b in batches}
