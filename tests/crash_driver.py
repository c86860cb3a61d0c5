"""Crash injection for the workspace store: kill a real process at each step of a commit.

Run as a script (``python tests/crash_driver.py BASE OUT CASES.json``), one process for
many cases: it imports colonnade once, and for every case forks a child that performs a
write and dies by ``os._exit`` (no clean-up, no ``finally``, like a kill) at the chosen
step of the commit, then forks a second child that performs the next write and dies at
its chosen step, and then checks the workspace in the parent. A "step" is every
file-system call that changes state or durability (open for writing, write, fsync,
rename, unlink, mkdir, truncate) made by the store while it commits.

The first write grows a task ``new``; the next write seals ``new`` if it was committed,
else grows it again. Afterwards: the workspace opens, its record verifies, every sealed
task checks ``exact``, no task committed before is missing, a commit that passed its
commit point is present, and a third, uninterrupted write records what was recovered.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
from pathlib import Path

STEP_CALLS = ("open", "write", "pwrite", "fsync", "replace", "rename", "unlink", "mkdir",
              "rmdir", "ftruncate")
_WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_TRUNC


def make_base(folder: Path) -> dict:
    """A small workspace with one sealed task, and the data files the cases use."""
    import numpy as np

    from colonnade.app.evidence import seal_workspace
    from colonnade.app.workspace import grow_workspace, new_workspace

    rng = np.random.default_rng(0)
    folder.mkdir(parents=True, exist_ok=True)
    files = {}
    for name, shift in (("old", 0.0), ("new", 1.5)):
        centers = rng.normal(size=(3, 8)).astype(np.float32) * 2 + shift
        y = np.repeat(np.arange(3), 40)
        x = (centers[y] + rng.normal(size=(120, 8)).astype(np.float32) * 0.3).astype(np.float32)
        np.savez(folder / f"{name}.npz", x=x, y=y)
        np.savez(folder / f"{name}_probe.npz", x=x[::4], y=y[::4])
        files[name] = (str(folder / f"{name}.npz"), str(folder / f"{name}_probe.npz"))
    spec = folder / "spec.yaml"
    spec.write_text("input: [8]\ncolumn:\n  - dense: 12\n  - act: relu\n  - dense: 8\n"
                    "  - act: relu\nlateral: {kind: linear}\n"
                    "train: {epochs: 1, batch_size: 64, seed: 0}\n")
    ws = folder / "ws"
    new_workspace(spec, ws, by="crash test")
    grow_workspace(ws, "old", files["old"][0], progress=False, by="crash test")
    seal_workspace(ws, "old", files["old"][1], by="crash test")
    return {"ws": str(ws), "files": files}


def _counting(limit: int | None, counter: list[int], trace: list[str]):
    """Wrap the os calls the store makes: count each step, die at step ``limit``."""
    real = {name: getattr(os, name) for name in STEP_CALLS}

    def step(name, args):
        counter[0] += 1
        target = args[-1] if name in ("replace", "rename") else (args[0] if args else "")
        trace.append(f"{name} {os.path.basename(str(target))}")
        if limit is not None and counter[0] == limit:
            os._exit(77)

    def wrap(name):
        fn = real[name]

        def call(*args, **kwargs):
            if name == "open" and not (args[1] if len(args) > 1 else kwargs.get("flags", 0)
                                       ) & _WRITE_FLAGS:
                return fn(*args, **kwargs)
            step(name, args)
            return fn(*args, **kwargs)
        return call
    return real, {name: wrap(name) for name in STEP_CALLS}


def _write(kind: str, ws: str, files: dict, crash_at: int | None) -> int:
    """Run one write in a forked child; return its exit status and steps seen (if done)."""
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:
        os.close(read)
        code = 0
        counter, trace = [0], []
        try:
            from colonnade.app.evidence import seal_workspace
            from colonnade.app.workspace import grow_workspace
            from colonnade.files import commit

            real, wrapped = _counting(crash_at, counter, trace)
            inner = commit.write_generation

            def counted(*args, **kwargs):
                for name, fn in wrapped.items():
                    setattr(os, name, fn)
                try:
                    return inner(*args, **kwargs)
                finally:
                    for name, fn in real.items():
                        setattr(os, name, fn)
            commit.write_generation = counted
            import colonnade.files.store as store
            store.write_generation = counted
            if kind == "seal":
                seal_workspace(ws, "new", files["new"][1], by="crash test")
            else:
                grow_workspace(ws, "new", files["new"][0], progress=False, by="crash test")
        except BaseException as exc:  # noqa: BLE001 -- reported to the parent
            os.write(write, f"error {type(exc).__name__}: {exc}".encode()[:4000])
            code = 1
        os.write(write, f"\nsteps {counter[0]}\ntrace {json.dumps(trace)}".encode())
        os._exit(code)
    os.close(write)
    chunks = []
    while chunk := os.read(read, 65536):
        chunks.append(chunk)
    os.close(read)
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status), b"".join(chunks).decode()


def _steps(text: str) -> int | None:
    for line in text.splitlines():
        if line.startswith("steps "):
            return int(line.split()[1])
    return None


def _trace(text: str) -> list[str]:
    for line in text.splitlines():
        if line.startswith("trace "):
            return json.loads(line[6:])
    return []


def verify(ws: str, expect_tasks: set[str], expect_sealed: set[str]) -> list[str]:
    """What is wrong with the workspace after the crashes (empty when it held)."""
    from colonnade.app.evidence import check_workspace
    from colonnade.files.store import load

    problems = []
    try:
        net = load(ws)
    except Exception as exc:  # noqa: BLE001 -- every failure is a finding here
        return [f"does not open: {exc}"]
    missing = expect_tasks - set(net.tasks)
    if missing:
        problems.append(f"committed tasks missing: {sorted(missing)}")
    report = check_workspace(ws)
    if not report.passed:
        problems.append(f"check fails: {report.record.first if report.record else ''} "
                        f"{[(t.task, t.verdict) for t in report.tasks]}")
    sealed = {t.task for t in report.tasks if t.verdict == "exact"}
    if not expect_sealed <= sealed:
        problems.append(f"sealed tasks not exact: {sorted(expect_sealed - sealed)}")
    return problems


def verify_record_only(ws: str, expect_tasks: set[str]) -> list[str]:
    """The lighter check after recovery: opens, record verifies, no task missing."""
    from colonnade.app.record import verify_record
    from colonnade.files.store import load

    try:
        net = load(ws)
    except Exception as exc:  # noqa: BLE001
        return [f"does not open after recovery: {exc}"]
    problems = [] if expect_tasks <= set(net.tasks) else ["a task went missing in recovery"]
    report = verify_record(ws)
    return problems + ([] if report.passed else [f"record after recovery: {report.first}"])


def run_case(base: dict, out: Path, first: int | None, second: int | None) -> dict:
    """One case: the grow killed at step ``first`` (None: not killed), then the next write
    killed at step ``second``, then a clean write; the verdict as a dict."""
    ws = out / f"case-{first}-{second}"
    shutil.rmtree(ws, ignore_errors=True)
    shutil.copytree(base["ws"], ws)
    case = {"first": first, "second": second, "problems": []}
    code, text = _write("grow", str(ws), base["files"], first)
    grown = code == 0
    case["first_steps"], case["first_trace"] = _steps(text), _trace(text)
    from colonnade.files.store import load

    after_first = set(load(ws).tasks)
    if grown and "new" not in after_first:
        case["problems"].append("the grow finished but its task is not there")
    kind = "seal" if "new" in after_first else "grow"
    code, text = _write(kind, str(ws), base["files"], second)
    case["second_steps"], case["second_trace"] = _steps(text), _trace(text)
    case["second_kind"] = kind
    if code not in (0, 77):
        case["problems"].append(f"the {kind} failed: {text.strip()[:300]}")
    expect_tasks = {"old"} | ({"new"} if "new" in after_first else set())
    expect_sealed = {"old"} | ({"new"} if kind == "seal" and code == 0 else set())
    case["problems"] += verify(str(ws), expect_tasks, expect_sealed)
    pending = (ws / ".pending").exists()
    from colonnade.app.transaction import recover

    try:
        found = recover(ws, by="crash test")
    except Exception as exc:  # noqa: BLE001
        case["problems"].append(f"recover failed: {exc}")
        found = None
    if pending and found is None:
        case["problems"].append("an interrupted write was left, but recover found nothing")
    case["recovered"] = found
    case["problems"] += verify_record_only(str(ws), expect_tasks)
    names = set(os.listdir(ws / "data"))
    listed = {p.name for p in _listed(ws)}
    if names != listed:
        case["problems"].append(f"files left over after recovery: {sorted(names - listed)}")
    shutil.rmtree(ws, ignore_errors=True)
    return case


def _listed(ws: Path):
    from colonnade.files.store import listed_files

    return listed_files(ws).values()


def main(argv: list[str]) -> int:
    import torch
    import torch._dynamo  # noqa: F401 -- the optimizers import it on their first step

    import colonnade.app.evidence  # noqa: F401 -- imported once here, not in every child
    import colonnade.app.transaction  # noqa: F401
    import colonnade.app.workspace  # noqa: F401

    torch.set_num_threads(1)
    base_dir, out, cases_json = Path(argv[0]), Path(argv[1]), argv[2]
    base = json.loads((base_dir / "base.json").read_text()) if (base_dir / "base.json"
                                                                ).exists() else None
    if base is None:
        base = make_base(base_dir)
        (base_dir / "base.json").write_text(json.dumps(base))
    out.mkdir(parents=True, exist_ok=True)
    cases = json.loads(cases_json)
    if cases == "count":  # how many steps each write has when nothing crashes
        result = run_case(base, out, None, None)
        print(json.dumps(result))
        return 0
    for first, second in cases:
        print(json.dumps(run_case(base, out, first, second)), flush=True)
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    sys.exit(main(sys.argv[1:]))
