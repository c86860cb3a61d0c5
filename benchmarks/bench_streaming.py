"""Training on data larger than memory: peak memory and epoch throughput, side by side.

Run with ``make bench`` (every benchmarks/bench_*.py) or on its own:
``.venv/bin/python benchmarks/bench_streaming.py [--gb 3] [--dir DIR] [--threads N]``.

Writes a float32 data set of ``--gb`` GB as a ``.npy`` file (features from a seeded
generator, labels from a fixed linear rule, so that training means something), then
trains one column on it in a child process that reads the file in batches (``--train
x.npy --labels y.npy``), and, alternating with it, in another child process that holds
an in-memory copy of the first third of the rows. Each child reports its epoch
throughput (training rows per second, from the training record) and its peak resident
memory (``resource.getrusage``'s ``ru_maxrss``, kibibytes on Linux). The targets (the
issue's): peak RSS of the streamed run below 1.5 GB, and its throughput at least 70 %
of the in-memory run's. Each figure is the best of ``--rounds`` alternating rounds (on a
shared machine other processes only ever slow a run down).

The file is written once and then read through the operating system's page cache, as it
would be on a machine whose RAM holds the file but whose process may not: the figure
measures colonnade's reading and batching, not the disk.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SRC = Path(__file__).resolve().parents[1] / "src"
FEATURES = 3072  # a 32 x 32 RGB image's worth of float32 per row (12 KiB)
CLASSES = 4
SPEC = {
    "name": "streaming-bench",
    "input": [FEATURES],
    "column": [{"dense": 128}, {"act": "relu"}, {"dense": 64}, {"act": "relu"}],
    "lateral": {"kind": "none"},
    "train": {"optimizer": "adamw", "lr": 0.001, "epochs": 1, "batch_size": 256,
              "patience": 0, "seed": 0},
}
PEAK_RSS_LIMIT_GB = 1.5  # the target
THROUGHPUT_FLOOR = 0.70  # the target


def write_data(folder: Path, gigabytes: float) -> tuple[Path, Path, int]:
    """x.npy (float32, rows of FEATURES) and y.npy, written in chunks (never whole)."""
    rows = int(gigabytes * 1e9) // (FEATURES * 4)
    x_path, y_path = folder / "x.npy", folder / "y.npy"
    rng = np.random.default_rng(0)
    rule = rng.standard_normal((FEATURES, CLASSES)).astype(np.float32)
    labels = np.empty(rows, dtype=np.int64)
    header = {"descr": "<f4", "fortran_order": False, "shape": (rows, FEATURES)}
    with open(x_path, "wb") as f:
        np.lib.format.write_array_header_1_0(f, header)
        for start in range(0, rows, 8192):
            chunk = rng.standard_normal((min(8192, rows - start), FEATURES), dtype=np.float32)
            labels[start:start + len(chunk)] = (chunk @ rule).argmax(1)
            f.write(chunk.tobytes())
    np.save(y_path, labels)
    return x_path, y_path, rows


def child(mode: str, x_path: str, y_path: str) -> None:
    """One training run; prints a JSON line with throughput and peak RSS."""
    sys.path.insert(0, str(SRC))
    import torch

    from colonnade.model.network import ProgressiveNet
    from colonnade.model.spec import parse_spec
    from colonnade.training.data import load_task_data
    from colonnade.training.datasets import subset
    from colonnade.training.fit import fit_task

    torch.set_num_threads(int(os.environ.get("BENCH_THREADS", "1")))
    spec = parse_spec(SPEC)
    data = load_task_data(x_path, tuple(spec.input), labels=y_path, seed=0)
    if mode == "memory":  # the first third of the rows, as tensors in memory
        third = int(data.x.shape[0]) // 3
        data.x, data.y = subset(data.x, np.arange(third)).materialize(), data.y[:third]
        v = int(data.x_val.shape[0]) // 3
        data.x_val, data.y_val = subset(data.x_val, np.arange(v)).materialize(), data.y_val[:v]
    net = ProgressiveNet(spec)
    net.add_column("bench", CLASSES, seed=0)
    record = fit_task(net, "bench", data, spec.train, epochs=1, progress=False)
    seconds = record.curve[0]["seconds"]
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"mode": mode, "rows": data.n_train, "val_rows": data.n_val,
                      "seconds": seconds, "rows_per_s": data.n_train / seconds,
                      "peak_rss_gb": peak_kib * 1024 / 1e9,
                      "val_accuracy": record.val_accuracy}))


def run_child(mode: str, x_path: Path, y_path: Path, threads: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", mode, str(x_path), str(y_path)],
                         capture_output=True, text=True, check=False,
                         env={**os.environ, "BENCH_THREADS": str(threads)})
    if out.returncode != 0:
        raise SystemExit(f"the {mode} run failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def bench_streaming(gigabytes: float = 3.0, rounds: int = 2, folder: str | None = None,
                    threads: int = 1) -> bool:
    """Print the comparison; True when both targets hold."""
    with tempfile.TemporaryDirectory(prefix="colonnade-bench-", dir=folder) as tmp:
        start = time.perf_counter()
        x_path, y_path, rows = write_data(Path(tmp), gigabytes)
        size = x_path.stat().st_size / 1e9
        print(f"streaming: {size:.2f} GB float32 set ({rows} rows of {FEATURES}) written in "
              f"{time.perf_counter() - start:.0f} s; one epoch of one column (dense 128, "
              f"dense 64, batch {SPEC['train']['batch_size']}), {threads} torch thread(s), "
              f"best of {rounds} alternating rounds")
        best: dict[str, dict] = {}
        for _ in range(rounds):
            for mode in ("memory", "streamed"):
                r = run_child(mode, x_path, y_path, threads)
                if mode not in best or r["rows_per_s"] > best[mode]["rows_per_s"]:
                    best[mode] = r
        mem, streamed = best["memory"], best["streamed"]
        ratio = streamed["rows_per_s"] / mem["rows_per_s"]
        rss_ok = streamed["peak_rss_gb"] < PEAK_RSS_LIMIT_GB
        speed_ok = ratio >= THROUGHPUT_FLOOR
        print(f"  in memory (a third, {mem['rows']} rows): {mem['rows_per_s']:.0f} rows/s, "
              f"peak RSS {mem['peak_rss_gb']:.2f} GB")
        print(f"  streamed  (all, {streamed['rows']} rows): {streamed['rows_per_s']:.0f} rows/s, "
              f"peak RSS {streamed['peak_rss_gb']:.2f} GB "
              f"[{'ok' if rss_ok else 'ABOVE'} target < {PEAK_RSS_LIMIT_GB} GB]")
        print(f"  throughput streamed / in memory: {ratio:.2f} "
              f"[{'ok' if speed_ok else 'BELOW'} target >= {THROUGHPUT_FLOOR:.2f}]")
        return rss_ok and speed_ok


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--gb", type=float, default=3.0, help="data set size (default 3)")
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--dir", help="where to write the data (default: the temp folder)")
    parser.add_argument("--threads", type=int, default=1, help="torch threads (default 1)")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(*args.child)
        return 0
    return 0 if bench_streaming(args.gb, args.rounds, args.dir, args.threads) else 1


if __name__ == "__main__":
    raise SystemExit(main())
