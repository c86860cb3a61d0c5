"""Every pair of crashes: the grow killed at step i of its commit, the next write at step j.

Run with ``make crash`` (or ``.venv/bin/python benchmarks/crash_pairs.py [--jobs N]``).
The test suite runs every single step and a sample of pairs (tests/test_crash.py); this
runs the whole square, which takes too long for CI, and prints how many pairs were tried
and how many held (opened, record verified, every sealed task exact, nothing committed
lost, recovery recorded). Each case forks a real process that dies by ``os._exit`` at the
chosen step (tests/crash_driver.py says exactly what a step is).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DRIVER = ROOT / "tests" / "crash_driver.py"


def _run(base: Path, out: Path, cases) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": f"{ROOT / 'src'}{os.pathsep}"
                                       f"{os.environ.get('PYTHONPATH', '')}"}
    return subprocess.Popen([sys.executable, str(DRIVER), str(base), str(out),
                             json.dumps(cases)], stdout=subprocess.PIPE, text=True, env=env)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=max(1, (os.cpu_count() or 1)),
                        help="driver processes side by side (default: one per core)")
    parser.add_argument("--stride", type=int, default=1,
                        help="take every k-th step of each write (1: the whole square)")
    args = parser.parse_args()
    start = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="colonnade-crash-") as tmp:
        base = Path(tmp) / "base"
        count = _run(base, Path(tmp) / "count", "count")
        clean = json.loads([line for line in count.communicate()[0].splitlines()
                            if line.startswith("{")][0])
        first, second = clean["first_steps"], clean["second_steps"]
        cases = [[i, j] for i in range(1, first + 1, args.stride)
                 for j in [None, *range(1, second + 1, args.stride)]]
        cases += [[None, j] for j in range(1, second + 1, args.stride)]
        chunks = [cases[k::args.jobs] for k in range(args.jobs)]
        procs = [_run(base, Path(tmp) / f"out{k}", chunk) for k, chunk in enumerate(chunks)]
        results = []
        for proc in procs:
            out, _ = proc.communicate()
            results += [json.loads(line) for line in out.splitlines() if line.startswith("{")]
    failed = [r for r in results if r["problems"]]
    pairs = sum(1 for r in results if r["first"] is not None and r["second"] is not None)
    print(f"grow commit: {first} steps; next write (seal or grow): {second} steps")
    print(f"cases tried: {len(results)} of {len(cases)} (pairs {pairs}, singles "
          f"{len(results) - pairs}); held: {len(results) - len(failed)}; "
          f"failed: {len(failed)}; {time.monotonic() - start:.0f} s")
    for case in failed[:10]:
        print(f"  first {case['first']} second {case['second']}: {case['problems']}")
    return 1 if failed or len(results) != len(cases) else 0


if __name__ == "__main__":
    sys.exit(main())
