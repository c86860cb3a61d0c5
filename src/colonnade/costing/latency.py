"""Latency measured on this machine: median of repeated timed calls, with the spread.

Measured, not derived, so it is reported beside the shape-derived costs and never
asserted on in tests. Three things keep the figures comparable on a busy machine:

* a stated, fixed thread count (default 1): torch's intra-op pool otherwise takes every
  core, and on a shared machine one thread waiting for another turns 0.07 ms into 70;
* interleaving: at each batch size every call is warmed up, then each repeat times every
  task once in turn, so a burst of load from elsewhere hits all tasks alike instead of
  one task's whole run;
* a spread check: a figure whose interquartile range exceeds ``SPREAD_LIMIT`` times its
  median is marked untrustworthy, and tables say so instead of printing it as a result.

One call is timed at a time with ``time.perf_counter`` after a few untimed warm-up calls
(first calls pay for allocation and kernel selection). On CUDA each call is synchronised
so the time covers the kernels.
"""

from __future__ import annotations

import contextlib
import math
import statistics
import time
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass

import torch

from ..errors import UsageError
from ..model.network import ProgressiveNet

__all__ = ["Latency", "time_calls", "task_latency", "all_tasks_latency", "measure_latencies",
           "summarise", "BATCHES", "SPREAD_LIMIT", "ALL_TASKS", "threads_context"]

BATCHES = (1, 64)
# Interquartile range over median above which a figure is not trusted. Our choice: on a
# quiet machine the measured ratio stays under 0.2 (measured here on the demo network);
# a busy one pushes it past 1.
SPREAD_LIMIT = 0.5
ALL_TASKS = "*"  # the key of the one-pass (forward_all) figures in measure_latencies


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

    @property
    def spread(self) -> float:
        """Interquartile range over median: how far the repeats disagree."""
        return (self.q3 - self.q1) / self.median if self.median > 0 else math.inf

    @property
    def trusted(self) -> bool:
        return self.spread <= SPREAD_LIMIT

    def to_dict(self) -> dict[str, float | int | str | bool]:
        out: dict[str, float | int | str | bool] = asdict(self)
        out.update(spread=self.spread, trusted=self.trusted, spread_limit=SPREAD_LIMIT)
        return out


def _quantile(sorted_ms: list[float], q: float) -> float:
    # Linear interpolation between closest ranks (numpy's default "linear" method).
    pos = (len(sorted_ms) - 1) * q
    lo = int(pos)
    hi = min(lo + 1, len(sorted_ms) - 1)
    return sorted_ms[lo] + (sorted_ms[hi] - sorted_ms[lo]) * (pos - lo)


def summarise(ms: list[float], batch: int, threads: int, device: str) -> Latency:
    """Median, quartiles and extremes of timed calls (milliseconds)."""
    ms = sorted(ms)
    return Latency(batch, len(ms), statistics.median(ms), _quantile(ms, 0.25),
                   _quantile(ms, 0.75), ms[0], ms[-1], threads, device)


def time_calls(fn: Callable[[], object], repeats: int, warmup: int = 3,
               sync: Callable[[], None] | None = None) -> list[float]:
    """Milliseconds of ``repeats`` calls of ``fn`` after ``warmup`` untimed ones."""
    for _ in range(warmup):
        fn()
    if sync:
        sync()
    out = []
    for _ in range(repeats):
        out.append(_time_one(fn, sync))
    return out


def _time_one(fn: Callable[[], object], sync: Callable[[], None] | None) -> float:
    start = time.perf_counter()
    fn()
    if sync:
        sync()
    return (time.perf_counter() - start) * 1000.0


@contextlib.contextmanager
def threads_context(threads: int) -> Iterator[None]:
    """Run with torch's intra-op thread count set to ``threads``, restored afterwards."""
    if not isinstance(threads, int) or threads < 1:
        raise UsageError(f"--threads takes a positive number of threads, got {threads}")
    before = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        yield
    finally:
        torch.set_num_threads(before)


def measure_latencies(net: ProgressiveNet, tasks: list[str] | None = None, repeats: int = 20,
                      batches: tuple[int, ...] = BATCHES, threads: int = 1,
                      one_pass: bool = True, warmup: int = 3,
                      ) -> dict[str, dict[int, Latency]]:
    """Each task's ``net(x, task=...)`` and, with ``one_pass``, ``net.forward_all(x)``
    (key ``ALL_TASKS``), timed interleaved at each batch size with ``threads`` threads."""
    tasks = list(net.tasks if tasks is None else tasks)
    for t in tasks:
        net.task(t)
    calls: dict[str, Callable[[torch.Tensor], object]] = {
        t: (lambda x, t=t: net(x, task=t)) for t in tasks}
    if one_pass and net.tasks:
        calls[ALL_TASKS] = net.forward_all
    device = net.device
    dtype = next((p.dtype for p in net.parameters() if p.is_floating_point()), torch.float32)
    sync = torch.cuda.synchronize if device.type == "cuda" else None
    out: dict[str, dict[int, Latency]] = {name: {} for name in calls}
    was_training = net.training
    net.eval()
    try:
        with threads_context(threads), torch.inference_mode():
            for b in batches:
                x = torch.randn((b, *net.input_shape), dtype=dtype,
                                generator=torch.Generator().manual_seed(0)).to(device)
                for call in calls.values():
                    for _ in range(warmup):
                        call(x)
                ms: dict[str, list[float]] = {name: [] for name in calls}
                for _ in range(repeats):
                    for name, call in calls.items():
                        ms[name].append(_time_one(lambda c=call, x=x: c(x), sync))
                for name in calls:
                    out[name][b] = summarise(ms[name], b, threads, str(device))
    finally:
        net.train(was_training)
    return out


def task_latency(net: ProgressiveNet, task: str, repeats: int = 20,
                 batches: tuple[int, ...] = BATCHES, threads: int = 1) -> dict[int, Latency]:
    """``net(x, task=task)`` timed at each batch size."""
    return measure_latencies(net, [task], repeats, batches, threads, one_pass=False)[task]


def all_tasks_latency(net: ProgressiveNet, repeats: int = 20,
                      batches: tuple[int, ...] = BATCHES, threads: int = 1,
                      ) -> dict[int, Latency]:
    """``net.forward_all(x)`` timed at each batch size: every task in one pass."""
    return measure_latencies(net, [], repeats, batches, threads)[ALL_TASKS]
