"""Every pair of crashes, and every step of every writing verb.

Run with ``make crash`` (or ``.venv/bin/python benchmarks/crash_pairs.py [--jobs N]``).
Two batteries; the test suite runs a sample of each (tests/test_crash.py), this runs them
whole, which takes too long for CI, and prints how many cases were tried and held:

- pairs (tests/crash_driver.py): the grow killed at step i of its commit, the next write
  (seal, or grow again) at step j, over the whole square; held means opened, record
  verified, every sealed task exact, nothing committed lost, recovery recorded;
- verbs (tests/crash_verbs.py): each writing verb (new, adopt, grow, seal, seal signed,
  unseal, usage, trim, retrain, retire, record start, recover, export, grow --nproc)
  killed at every
  file-system step from taking the lock to its last clean-up; held means one whole
  generation, old or new, recover, record verified, the next write succeeds.

Each case forks a real process that dies by ``os._exit`` at the chosen step.
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
VERBS_DRIVER = ROOT / "tests" / "crash_verbs.py"
VERBS = ["new", "adopt", "grow", "seal", "seal-signed", "unseal", "usage", "trim", "retrain",
         "retire", "record-start", "recover", "export", "grow-nproc"]
SLOW = "grow-nproc"  # spawns two ranks per case: a driver of its own (not in the suite)


def _run(base: Path, out: Path, cases, driver: Path = DRIVER) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": f"{ROOT / 'src'}{os.pathsep}"
                                       f"{os.environ.get('PYTHONPATH', '')}"}
    return subprocess.Popen([sys.executable, str(driver), str(base), str(out),
                             json.dumps(cases)], stdout=subprocess.PIPE, text=True, env=env)


def _verbs(tmp: Path, jobs: int) -> list[dict]:
    """Every step of every writing verb, the verbs spread over ``jobs`` drivers."""
    base = tmp / "verbs-base"
    _run(base, tmp / "verbs-setup", {"verbs": [], "steps": "all"}, VERBS_DRIVER).communicate()
    rest = [v for v in VERBS if v != SLOW]
    chunks = [[SLOW]] + [rest[k::jobs - 1] for k in range(jobs - 1)] if jobs > 1 else [VERBS]
    procs = [_run(base, tmp / f"verbs{k}", {"verbs": chunk, "steps": "all"}, VERBS_DRIVER)
             for k, chunk in enumerate(chunks) if chunk]
    results = []
    for proc in procs:
        out, _ = proc.communicate()
        results += [json.loads(line) for line in out.splitlines() if line.startswith("{")]
    return results


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=max(1, (os.cpu_count() or 1)),
                        help="driver processes side by side (default: one per core)")
    parser.add_argument("--stride", type=int, default=1,
                        help="take every k-th step of each write (1: the whole square)")
    parser.add_argument("--no-verbs", dest="verbs", action="store_false",
                        help="the pairs only, not every step of every writing verb")
    parser.add_argument("--no-pairs", dest="pairs", action="store_false",
                        help="every step of every writing verb only, not the pairs")
    args = parser.parse_args()
    start = time.monotonic()
    code = 0
    with tempfile.TemporaryDirectory(prefix="colonnade-crash-") as tmp:
        if args.pairs:
            code |= _pairs(Path(tmp), args)
        if args.verbs:
            code |= _all_verbs(Path(tmp), args.jobs)
    print(f"make crash: {time.monotonic() - start:.0f} s in all")
    return code


def _pairs(tmp: Path, args: argparse.Namespace) -> int:
    """The whole square of pairs; prints its figures, returns 1 if any case failed."""
    start = time.monotonic()
    base = tmp / "base"
    count = _run(base, tmp / "count", "count")
    clean = json.loads([line for line in count.communicate()[0].splitlines()
                        if line.startswith("{")][0])
    first, second = clean["first_steps"], clean["second_steps"]
    cases = [[i, j] for i in range(1, first + 1, args.stride)
             for j in [None, *range(1, second + 1, args.stride)]]
    cases += [[None, j] for j in range(1, second + 1, args.stride)]
    chunks = [cases[k::args.jobs] for k in range(args.jobs)]
    procs = [_run(base, tmp / f"out{k}", chunk) for k, chunk in enumerate(chunks)]
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


def _all_verbs(tmp: Path, jobs: int) -> int:
    """Every step of every writing verb; prints its figures, 1 if any case failed."""
    start = time.monotonic()
    verbs = _verbs(tmp, jobs)
    failed = [r for r in verbs if r["problems"]]
    steps = {r["verb"]: r.get("of") for r in verbs}
    print("writing verbs, steps each: " + ", ".join(f"{v} {steps.get(v)}" for v in VERBS))
    print(f"verb cases tried: {len(verbs)}; held: {len(verbs) - len(failed)}; "
          f"failed: {len(failed)}; {time.monotonic() - start:.0f} s")
    for case in failed[:10]:
        print(f"  {case['verb']} killed at step {case['step']}: {case['problems']}")
    missing = [v for v in VERBS if not steps.get(v)]
    tried = sum(n for n in steps.values() if n)
    return 1 if failed or missing or len(verbs) != tried else 0


if __name__ == "__main__":
    sys.exit(main())
