"""Speed of colonnade's own machinery, measured side by side in one run.

Run with ``make bench`` (or ``.venv/bin/python benchmarks/run.py``). Prints the machine,
the versions, and five comparisons, each as a ratio of two timings taken alternately in
this same process, beside the ideal ratio from operation counts where one exists:

1. an epoch of training task 6 with the frozen-activation cache against without it,
   for linear and for nonlinear lateral adapters;
2. all six tasks in one ``forward_all`` pass against six per-task calls;
3. the grown network's forward against a hand-written plain PyTorch module with the
   same layers and weights, at batch 1 and 256;
4. achieved GFLOP/s of a wide dense column at batch 256 against a large fp32 matmul;
5. shipped artifacts in onnxruntime: one all-task file against one file per task, int8
   against float32 and their file sizes, on the demo's template and on a wide network
   (benchmarks/shipping.py).

Operation counts come from torch.utils.flop_counter.FlopCounterMode (matmuls and
convolutions; one multiply-accumulate is 2 FLOPs), not from colonnade's own accounting.
Each timing is the minimum over alternating rounds (a, b, a, b, ...): on a shared machine
other processes only ever add time, so the minimum is the least disturbed figure (the
advice of Python's timeit documentation). Read the ratios, not the absolute times.
"""

from __future__ import annotations

import argparse
import copy
import os
import platform
import re
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

import torch
import torch.nn as nn
import torch.nn.functional as F
from torch.utils.flop_counter import FlopCounterMode

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from shipping import bench_shipping  # noqa: E402 (benchmarks/shipping.py, beside this file)

from colonnade import __version__  # noqa: E402
from colonnade.model.network import ProgressiveNet  # noqa: E402
from colonnade.model.spec import parse_spec  # noqa: E402
from colonnade.training.data import TaskData  # noqa: E402
from colonnade.training.fit import fit_task  # noqa: E402


# ----------------------------------------------------------------------------- helpers
def flops(fn: Callable[[], object]) -> int:
    with FlopCounterMode(display=False) as counter:
        fn()
    return counter.get_total_flops()


def timed(fn: Callable[[], object], repeat: int) -> float:
    """Mean seconds of one call over ``repeat`` calls."""
    start = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - start) / repeat


def side_by_side(a: Callable[[], object], b: Callable[[], object], rounds: int,
                 repeat: int) -> tuple[float, float]:
    """Least time of a and of b over alternating rounds, after one warm-up call each."""
    a()
    b()
    ta, tb = [], []
    for _ in range(rounds):
        ta.append(timed(a, repeat))
        tb.append(timed(b, repeat))
    return min(ta), min(tb)


def verdict(ok: bool) -> str:
    return "goal met" if ok else "goal NOT met"


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return (f"{cpu}; {os.cpu_count()} logical CPUs; {platform.system()} "
            f"{platform.release()}")


def dense_spec(width: int, inputs: int, layers: int, kind: str, batch: int) -> dict:
    column = []
    for _ in range(layers):
        column += [{"dense": width}, {"act": "relu"}]
    return {"name": f"bench-{kind}", "input": [inputs], "column": column,
            "lateral": {"kind": kind, "reduce": 0.5},
            "train": {"optimizer": "adamw", "lr": 1e-3, "batch_size": batch, "patience": 0,
                      "seed": 0}}


def grown_net(raw: dict, tasks: int, classes: int) -> ProgressiveNet:
    net = ProgressiveNet(parse_spec(raw))
    for t in range(tasks):
        net.add_column(f"task{t + 1}", classes, seed=t)
    net.freeze()
    return net


def random_data(inputs: int, classes: int, n: int, n_val: int) -> TaskData:
    g = torch.Generator().manual_seed(0)
    return TaskData(torch.randn(n, inputs, generator=g),
                    torch.randint(0, classes, (n,), generator=g),
                    torch.randn(n_val, inputs, generator=g),
                    torch.randint(0, classes, (n_val,), generator=g), classes, "random")


# ----------------------------------------------------------------------------- 1. cache
def training_ideal(net: ProgressiveNet, task: str, data: TaskData, batch: int) -> float:
    """FLOPs of one epoch (train steps + validation) without the cache over with it."""
    from colonnade.training.cache import FrozenActivations

    xb, yb = data.x[:batch], data.y[:batch]
    xv = data.x_val[:256]
    cache = FrozenActivations(net, task, xb, batch, 1 << 30)
    vcache = FrozenActivations(net, task, xv, 256, 1 << 30)

    def step(given):
        net.train()
        F.cross_entropy(net(xb, task=task, given=given), yb).backward()
        net.zero_grad(set_to_none=True)

    def val(given):
        with torch.no_grad():
            net.eval()
            net(xv, task=task, given=given)

    steps = data.n_train / batch
    vals = data.n_val / 256
    full = steps * flops(lambda: step(None)) + vals * flops(lambda: val(None))
    cut = (steps * flops(lambda: step(cache.rows(slice(0, batch))))
           + vals * flops(lambda: val(vcache.rows(slice(0, 256)))))
    cache.close()
    vcache.close()
    net.eval()
    return full / cut


CACHE_WIDTH, CACHE_BATCH = 512, 256


def bench_cache(kind: str, quick: bool) -> None:
    width, inputs, classes, batch = CACHE_WIDTH, CACHE_WIDTH, 10, CACHE_BATCH
    n = 1024 if quick else 2048
    data = random_data(inputs, classes, n, n // 4)
    base = grown_net(dense_spec(width, inputs, 3, kind, batch), 5, classes)
    probe = copy.deepcopy(base)
    probe.add_column("task6", classes, seed=5)
    ideal = training_ideal(probe, "task6", data, batch)
    epochs = 2
    per_epoch: dict[bool, list[float]] = {True: [], False: []}
    build = []
    for _ in range(2):
        for cache in (True, False):
            net = copy.deepcopy(base)
            net.add_column("task6", classes, seed=5)
            record = fit_task(net, "task6", data, net.spec.train, epochs=epochs, seed=5,
                              progress=False, cache=cache)
            per_epoch[cache] += [c["seconds"] for c in record.curve]
            found = re.search(r"built in ([0-9.]+) s", record.cache)
            if cache and found:
                build.append(float(found.group(1)))
    on, off = min(per_epoch[True]), min(per_epoch[False])
    ratio = off / on
    print(f"  {kind:9s} laterals: epoch {off * 1e3:7.1f} ms without cache, {on * 1e3:7.1f} ms "
          f"with ({ratio:.2f}x; ideal from FLOPs {ideal:.2f}x; {verdict(ratio >= 1.8)}: "
          f">= 1.8x); one-time cache build {statistics.median(build) * 1e3:.1f} ms")


# ----------------------------------------------------------------------------- 2. all tasks
def bench_all_tasks(quick: bool) -> ProgressiveNet:
    net = grown_net(dense_spec(256, 256, 3, "linear", 128), 6, 10)
    x = torch.randn(256, 256)
    ideal = sum(flops(lambda t=t: net(x, task=t)) for t in net.tasks) / flops(
        lambda: net.forward_all(x))

    def each():
        for t in net.tasks:
            net(x, task=t)

    with torch.no_grad():
        t_each, t_all = side_by_side(each, lambda: net.forward_all(x), 3, 5 if quick else 10)
    ratio = t_each / t_all
    print(f"  batch 256: six per-task calls {t_each * 1e3:.2f} ms, one forward_all "
          f"{t_all * 1e3:.2f} ms: {ratio:.2f}x; ideal from FLOPs {ideal:.2f}x; "
          f"{ratio / ideal:.0%} of ideal ({verdict(ratio >= 0.9 * ideal)}: >= 90%)")
    return net


# ----------------------------------------------------------------------------- 3. plain
class PlainProgressive(nn.Module):
    """The same network written by hand: three dense layers a column, linear laterals."""

    def __init__(self, net: ProgressiveNet) -> None:
        super().__init__()
        self.w = nn.ModuleList(nn.ModuleList(copy.deepcopy(b.weighted) for b in c.blocks)
                               for c in net.columns)
        self.lat = nn.ModuleList(
            nn.ModuleList(nn.ModuleList(copy.deepcopy(net.adapters[f"c{k}_b{b}_from_c{j}"].U)
                                        for j in range(k)) for b in (1, 2))
            for k in range(len(net.columns)))
        last = net.tasks[-1]
        self.head = copy.deepcopy(net.heads[last])
        self.head_lat = nn.ModuleList(copy.deepcopy(net.adapters[f"h_{last}_from_c{j}"].U)
                                      for j in range(len(net.columns) - 1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        hs: list[tuple[torch.Tensor, torch.Tensor, torch.Tensor]] = []
        for k, (w0, w1, w2) in enumerate(self.w):
            a = torch.relu(w0(x))
            z = w1(a)
            for j in range(k):
                z = z + self.lat[k][0][j](hs[j][0])
            b = torch.relu(z)
            z = w2(b)
            for j in range(k):
                z = z + self.lat[k][1][j](hs[j][1])
            hs.append((a, b, torch.relu(z)))
        logits = self.head(hs[-1][2])
        for j, u in enumerate(self.head_lat):
            logits = logits + u(hs[j][2])
        return logits


def module_calls(fn: Callable[[], object]) -> int:
    """nn.Module calls made by ``fn``: the Python overhead a batch of one pays for."""
    count = [0]

    def hook(module, args):  # noqa: ANN001 (torch's global hook signature)
        count[0] += 1

    handle = nn.modules.module.register_module_forward_pre_hook(hook)
    try:
        fn()
    finally:
        handle.remove()
    return count[0]


def bench_plain(net: ProgressiveNet, quick: bool) -> None:
    plain = PlainProgressive(net).eval()
    task = net.tasks[-1]
    probe = torch.randn(1, 256)
    with torch.no_grad():
        calls = (module_calls(lambda: net(probe, task=task)), module_calls(lambda: plain(probe)))
    print(f"  module calls per forward: colonnade {calls[0]}, plain {calls[1]} (adapter "
          f"wrappers, block containers, empty stems)")
    for batch in (1, 256):
        x = torch.randn(batch, 256)
        with torch.no_grad():
            same = torch.equal(plain(x), net(x, task=task))
            repeat = (50 if batch == 1 else 5) // (2 if quick else 1)
            t_plain, t_net = side_by_side(lambda x=x: plain(x), lambda x=x: net(x, task=task),
                                          21, repeat)
        ratio = t_net / t_plain
        print(f"  batch {batch:3d}: plain module {t_plain * 1e3:.3f} ms, colonnade "
              f"{t_net * 1e3:.3f} ms: {ratio:.2f}x ({verdict(ratio <= 1.15)}: <= 1.15x); "
              f"outputs {'bit-identical' if same else 'DIFFER'}")


# ----------------------------------------------------------------------------- 4. GFLOP/s
def bench_gflops(quick: bool) -> None:
    net = grown_net(dense_spec(2048, 1024, 3, "linear", 256), 1, 10)
    x = torch.randn(256, 1024)
    work = flops(lambda: net(x, task="task1"))
    a, b = torch.randn(2048, 2048), torch.randn(2048, 2048)
    mm_work = flops(lambda: a @ b)
    repeat = 5 if quick else 10
    with torch.no_grad():
        t_net, t_mm = side_by_side(lambda: net(x, task="task1"), lambda: a @ b, 3, repeat)
    g_net, g_mm = work / t_net / 1e9, mm_work / t_mm / 1e9
    print(f"  dense column 1024-2048-2048-2048 at batch 256: {g_net:.1f} GFLOP/s; "
          f"2048x2048 fp32 matmul: {g_mm:.1f} GFLOP/s; ratio {g_net / g_mm:.2f} "
          f"({verdict(g_net / g_mm >= 0.5)}: >= 0.5)")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1,
                        help="torch threads (default 1: steady on a shared machine)")
    parser.add_argument("--quick", action="store_true", help="fewer rows and repeats")
    parser.add_argument("--int8-variants", action="store_true",
                        help="also measure three alternative int8 settings (benchmark 5)")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    start = time.perf_counter()
    print(f"machine: {machine()}")
    print(f"python {platform.python_version()}, torch {torch.__version__}, colonnade "
          f"{__version__}; {torch.get_num_threads()} torch threads; device cpu; float32")
    section = [time.perf_counter()]

    def took() -> None:  # each section's wall time, so a slow one shows
        now = time.perf_counter()
        print(f"  ({now - section[0]:.0f} s)")
        section[0] = now

    print(f"1. training task 6 (five frozen columns, 3 x dense {CACHE_WIDTH}, batch "
          f"{CACHE_BATCH}), epoch time:")
    for kind in ("linear", "nonlinear"):
        bench_cache(kind, args.quick)
    took()
    print("2. six tasks (six columns, 3 x dense 256, linear laterals), forward:")
    net = bench_all_tasks(args.quick)
    took()
    print("3. task 6 forward against a hand-written plain module, same layers and weights:")
    bench_plain(net, args.quick)
    took()
    print("4. achieved throughput of one wide dense column:")
    bench_gflops(args.quick)
    took()
    print("5. shipped artifacts in onnxruntime, one thread:")
    bench_shipping(args.quick, verdict, args.int8_variants)
    took()
    print(f"total {time.perf_counter() - start:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
