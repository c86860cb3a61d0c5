"""One writer at a time: real processes racing on one workspace, and readers during commits.

The lock is the kernel's ``flock`` (Linux flock(2)): held by an open file, released when
the process dies however it dies. The invariant checked everywhere below: never two
writers that both exit 0 with one change lost; a writer that cannot get the lock stops
with one sentence and exit code 3.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import child_env, snapshot, strace_path

from colonnade.app.record import verify_record
from colonnade.app.transaction import lock_wait
from colonnade.app.workspace import grow_workspace, new_workspace
from colonnade.errors import BusyError
from colonnade.files import store

ENV = child_env()
SPEC = ("input: [8]\ncolumn:\n  - dense: 12\n  - act: relu\nlateral: {kind: linear}\n"
        "train: {epochs: 2, batch_size: 32, seed: 0}\n")


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    root = tmp_path_factory.mktemp("lock")
    rng = np.random.default_rng(1)
    data = {}
    for name in ("a", "x", "y"):
        y = np.repeat(np.arange(3), 30)
        x = (rng.normal(size=(3, 8))[y] * 2 + rng.normal(size=(90, 8)) * 0.3).astype("float32")
        np.savez(root / f"{name}.npz", x=x, y=y)
        data[name] = str(root / f"{name}.npz")
    (root / "spec.yaml").write_text(SPEC)
    ws = root / "ws"
    new_workspace(root / "spec.yaml", ws)
    grow_workspace(ws, "a", data["a"], progress=False)
    return root, ws, data


def _copy(small, tmp_path) -> Path:
    import shutil

    shutil.copytree(small[1], tmp_path / "ws")
    return tmp_path / "ws"


# Holds the writer lock until told to let go (a line on its stdin, or its end when the
# test goes away), never for a time: a verdict must not depend on how fast anything runs.
HOLD = """
import sys
from colonnade.files.lock import writer_lock
with writer_lock(sys.argv[1], "grow"):
    print("held", flush=True)
    sys.stdin.readline()
"""


def _holder(ws: Path) -> subprocess.Popen:
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(ws)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env=ENV)
    assert proc.stdout.readline().strip() == "held"
    return proc


def _release(holder: subprocess.Popen) -> None:
    try:
        holder.stdin.write("go\n")
        holder.stdin.close()
    except BrokenPipeError:  # it is gone already (killed by the test)
        pass


def _cli(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "colonnade", *args], capture_output=True,
                          text=True, env=ENV, timeout=300)


def test_a_second_writer_stops_with_exit_3_naming_the_holder(small, tmp_path):
    ws = _copy(small, tmp_path)
    before = snapshot(ws)
    holder = _holder(ws)
    try:
        done = _cli("grow", str(ws), "--task", "x", "--train", small[2]["x"], "--quiet",
                    "--wait", "0")
    finally:
        holder.kill()
        holder.wait()
    assert done.returncode == 3, done.stderr
    assert "Traceback" not in done.stderr and done.stderr.count("\n") == 1
    assert f"pid {holder.pid} on host" in done.stderr and "(grow since" in done.stderr
    after = snapshot(ws)
    after.pop(".writer.lock"), before.pop(".writer.lock")  # the killed holder's own note
    assert after == before


def test_a_killed_writer_leaves_no_stale_lock(small, tmp_path):
    ws = _copy(small, tmp_path)
    holder = _holder(ws)
    os.kill(holder.pid, signal.SIGKILL)
    holder.wait()
    with lock_wait(0):  # the kernel released the lock with the process
        grow_workspace(ws, "x", small[2]["x"], progress=False)
    assert store.load(ws).tasks == ["a", "x"]


def test_a_writer_waits_for_the_holder_and_says_so(small, tmp_path):
    """The holder lets go only once the writer has said that it waits (before: it let go
    after 1.5 s, and a writer slower than that to reach the lock never waited)."""
    ws = _copy(small, tmp_path)
    manifest = (ws / "manifest.yaml").read_bytes()
    holder = _holder(ws)
    seen: dict[str, bytes] = {}

    def release_once_waiting(said) -> None:
        while holder.poll() is None and not any("holds the writer lock" in str(w.message)
                                                for w in said):
            time.sleep(0.01)  # polling only: the holder waits for the writer, however long
        seen["manifest"] = (ws / "manifest.yaml").read_bytes()  # still held: unchanged
        _release(holder)

    # 600 s: only a writer that never gets the lock fails here, never a slow one.
    with pytest.warns(UserWarning, match="holds the writer lock; waiting up to 600 s") as said:
        releaser = threading.Thread(target=release_once_waiting, args=(said,))
        releaser.start()
        try:
            with lock_wait(600):
                grow_workspace(ws, "x", small[2]["x"], progress=False)
        finally:
            if holder.poll() is None and not seen:
                holder.kill()
            releaser.join()
    assert seen["manifest"] == manifest  # nothing was committed while the holder held it
    assert holder.wait() == 0  # it let go when told, and only then could the grow commit
    assert store.load(ws).tasks == ["a", "x"]
    with lock_wait(0):
        holder = _holder(ws)
        try:
            with pytest.raises(BusyError):
                grow_workspace(ws, "y", small[2]["y"], progress=False)
        finally:
            holder.kill()
            holder.wait()


def _race(commands: list[list[str]]) -> list[subprocess.CompletedProcess]:
    procs = [subprocess.Popen([sys.executable, "-m", "colonnade", *c], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, env=ENV) for c in commands]
    results = []
    for proc, command in zip(procs, commands, strict=True):
        out, err = proc.communicate(timeout=300)
        results.append(subprocess.CompletedProcess(command, proc.returncode, out, err))
    return results


def test_two_real_grows_and_two_real_seals_never_lose_a_change(small, tmp_path):
    ws = _copy(small, tmp_path)
    data = small[2]
    grows = _race([["grow", str(ws), "--task", t, "--train", data[t], "--quiet", "--wait",
                    "120"] for t in ("x", "y")])
    tasks = store.load(ws).tasks
    for result, task in zip(grows, ("x", "y"), strict=True):
        assert result.returncode in (0, 3), result.stderr
        assert (task in tasks) == (result.returncode == 0), (task, tasks, result.stderr)
    assert [r.returncode for r in grows] == [0, 0]  # with --wait, both got their turn
    seals = _race([["seal", str(ws), "--task", t, "--probe", data[t], "--wait", "0"]
                   for t in ("x", "y")])
    sealed = set(store.load(ws).meta.get("seals") or {})
    for result, task in zip(seals, ("x", "y"), strict=True):
        assert result.returncode in (0, 3), result.stderr
        assert (task in sealed) == (result.returncode == 0), (task, sealed, result.stderr)
        if result.returncode == 3:
            assert "busy" in result.stderr and "Traceback" not in result.stderr
    assert verify_record(ws).passed


def test_readers_never_see_a_commit_in_flight(small, tmp_path):
    """Loads and record checks while another thread commits generation after generation:
    the writer goes on until the reader has read enough times, and the reader until the
    writer has committed enough times (before: 40 commits, and a reader scheduled less
    than the writer could be left with fewer reads than the test asked for)."""
    ws = _copy(small, tmp_path)
    stop = threading.Event()
    commits: list[int] = []
    failed: list[BaseException] = []

    def writer():
        try:
            net = store.load(ws)
            while not stop.is_set():
                k = len(commits) + 1
                net.attachments["extra.safetensors"] = {"k": torch.full((256,), float(k))}
                store.save(net, ws)
                commits.append(k)
        except BaseException as exc:  # noqa: BLE001 - reported by the test below
            failed.append(exc)

    thread = threading.Thread(target=writer)
    thread.start()
    reads = 0
    try:
        while thread.is_alive() and (reads < 20 or len(commits) < 20):
            net = store.load(ws)  # strict: a half-collected generation would raise here
            assert net.tasks == ["a"]
            report = verify_record(ws)
            assert report.passed, report.first
            reads += 1
    finally:
        stop.set()
        thread.join()
    assert failed == []
    assert len(commits) >= 20 and reads >= 20, (len(commits), reads)


def test_a_commit_beside_a_reader_leaves_old_files_but_no_false_recovery(small, tmp_path):
    """A reader holding the reader lock holds back the clean-up only: the next writer
    collects the old files and records no 'recovered' entry for a commit that was whole."""
    from colonnade.files.lock import reader_lock

    ws = _copy(small, tmp_path)
    net = store.load(ws)
    net.attachments["extra.safetensors"] = {"k": torch.zeros(3)}
    old = set(os.listdir(ws / "data"))
    with reader_lock(ws):
        store.save(net, ws)
    assert old <= set(os.listdir(ws / "data"))  # nothing deleted under a reader
    assert not (ws / ".pending").exists()
    net.attachments["extra.safetensors"] = {"k": torch.ones(3)}
    store.save(net, ws)
    assert set(os.listdir(ws / "data")) == {p.name for p in store.listed_files(ws).values()}
    assert [e.get("step") for e in store.load(ws).meta["history"]].count("recovered") == 0


STRACE = strace_path()


@pytest.mark.skipif(STRACE is None, reason="strace is missing or may not trace here (make "
                                           "setup installs it)")
@pytest.mark.parametrize("verb", ["grow", "seal"])
def test_a_second_real_writer_waits_or_stops_then_takes_over_from_a_killed_first(
        small, tmp_path, verb):
    """Two real commands on one workspace. The first is stopped inside its commit, holding
    the lock: strace's fault injection (``inject=fsync:signal=STOP:when=2``, the strace
    manual) stops it at its second fsync, the folder's, once its ``.pending`` note is in
    place, which is how this test knows it holds the lock (no sleep decides anything). A
    second writer with --wait 0 stops with exit 3 naming it; one with --wait waits, says
    so once, gets the lock as soon as the first is SIGKILLed, and records what the first
    left."""
    ws = _copy(small, tmp_path)
    data = small[2]
    args = {"grow": ["grow", str(ws), "--task", "x", "--train", data["x"], "--quiet"],
            "seal": ["seal", str(ws), "--task", "a", "--probe", data["a"]]}[verb]
    first = subprocess.Popen([STRACE, "-f", "-qq", "-o", os.devnull, "-e", "trace=fsync",
                              "-e", "inject=fsync:signal=STOP:when=2", sys.executable, "-m",
                              "colonnade", *args], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, env=ENV)
    holder = None
    try:
        deadline = time.monotonic() + 300
        while holder is None and time.monotonic() < deadline and first.poll() is None:
            try:
                holder = int(json.loads((ws / ".pending").read_text())["pid"])
            except (OSError, ValueError):
                time.sleep(0.05)
        assert holder is not None, first.communicate()[1]
        assert (ws / ".writer.lock").read_text().startswith(f"pid {holder} on host")
        busy = _cli(*args, "--wait", "0")
        assert busy.returncode == 3, busy.stderr
        assert busy.stderr.count("\n") == 1 and "Traceback" not in busy.stderr
        assert f"busy, pid {holder} on host" in busy.stderr and f"({verb} since" in busy.stderr
        second = subprocess.Popen([sys.executable, "-m", "colonnade", *args, "--wait", "600"],
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                  env=ENV)
        said = second.stderr.readline()  # printed once it found the lock held: waiting
        assert f"pid {holder} on host" in said and "waiting up to 600 s" in said, said
        os.kill(holder, signal.SIGKILL)
        out, err = second.communicate(timeout=300)
    finally:
        if holder is not None:
            try:
                os.kill(holder, signal.SIGKILL)
            except ProcessLookupError:
                pass
        first.kill()
        first.communicate()
    assert second.returncode == 0, err
    assert "Traceback" not in err and err.count("\n") <= 1  # the one waiting line
    net = store.load(ws)
    steps = [e["step"] for e in net.meta["history"]]
    assert "recovered" in steps  # the killed first's note, recorded by the second
    assert ("x" in net.tasks) if verb == "grow" else ("a" in (net.meta.get("seals") or {}))
    assert verify_record(ws).passed
    assert not list(ws.glob(".tmp-*")) and not (ws / ".pending").exists()
