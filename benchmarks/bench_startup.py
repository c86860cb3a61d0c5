"""Start-up of a read-only verb: ``colonnade show`` against a bare ``import yaml`` process.

``show`` reads only the manifest (never torch), so a process running it should cost about
what a Python process that imports yaml costs. Goal: within 3x. For scale, the third row
is a process that loads the same workspace whole (torch and the weights), which is what
``show`` did before it read the manifest alone. Each figure is the least wall time over
alternating runs (on a shared machine other work only adds time).

Run: ``make bench`` (all benchmarks) or ``.venv/bin/python benchmarks/bench_startup.py``.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

import colonnade  # noqa: E402
from colonnade.training.data import TaskData  # noqa: E402

SPEC = {"name": "startup-bench", "input": [64],
        "column": [{"dense": 64}, {"act": "relu"}, {"dense": 64}, {"act": "relu"}],
        "lateral": {"kind": "linear"}, "train": {"epochs": 1, "seed": 0}}


def workspace(folder: Path, tasks: int) -> Path:
    import torch

    net = colonnade.create(SPEC, folder)
    rng = np.random.default_rng(0)
    for t in range(tasks):
        x = torch.tensor(rng.normal(size=(256, 64)), dtype=torch.float32)
        y = torch.tensor(rng.integers(0, 4, size=256))
        colonnade.grow(net, f"task{t}", TaskData(x[:192], y[:192], x[192:], y[192:], 4, "bench"),
                       progress=False)
    colonnade.save(net, folder)
    return folder


def wall(cmd: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - start


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=7)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        ws = workspace(Path(tmp) / "ws", 4)
        py = sys.executable
        cmds = {"python -c 'import yaml'": [py, "-c", "import yaml"],
                "colonnade show WS": [py, "-m", "colonnade", "show", str(ws)],
                "python: colonnade.load(WS)": [py, "-c", "import colonnade, sys; "
                                               "colonnade.load(sys.argv[1])", str(ws)]}
        best = {name: float("inf") for name in cmds}
        for _ in range(args.rounds):
            for name, cmd in cmds.items():
                best[name] = min(best[name], wall(cmd))
    base = best["python -c 'import yaml'"]
    print("start-up of a read-only verb (least wall time of "
          f"{args.rounds} alternating runs):")
    for name, t in best.items():
        print(f"  {name:28s} {t * 1e3:7.1f} ms  {t / base:5.2f}x")
    ratio = best["colonnade show WS"] / base
    print(f"  show against import yaml: {ratio:.2f}x (goal: at most 3x: "
          f"{'met' if ratio <= 3 else 'NOT met'})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
