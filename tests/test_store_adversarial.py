"""The workspace store attacked from outside: cases its first tests did not try.

Each test here failed before the fix it guards (threads sharing one process's lock, a
forked child keeping the lock, a FIFO as a lock file, a crafted ``.pending`` note, a
manifest claiming gigabytes, a failed save that changed the network in memory, two
creates racing for one folder, a folder where a data file goes), except the full-disk
and SIGTERM sweeps, which held and stay as evidence. The references are outside the
project: the kernel's own behaviour (flock(2) locks belong to an open file description
and are shared with a forked child; open(2) of a FIFO for reading waits for a writer;
ENOSPC from write(2); SIGTERM's default action ends the process without unwinding), and
``resource.setrlimit`` bounding a child's memory.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import os
import resource
import signal
import threading
import time

import pytest
from conftest import snapshot

from colonnade.app.record import verify_record
from colonnade.app.transaction import recover
from colonnade.errors import BusyError, WorkspaceError
from colonnade.files import commit, lock, store
from colonnade.files.lock import writer_lock
from colonnade.model.network import ProgressiveNet

SPEC = {"input": [8], "column": [{"dense": 6}, {"act": "relu"}], "lateral": {"kind": "linear"}}
LOCKS = (".writer.lock", ".reader.lock")


def _ws(folder, tasks=1):
    net = store.create(SPEC, folder)
    for k in range(tasks):
        net.add_column(f"t{k}", 3, seed=k)
        net.freeze()
    store.save(net, folder)
    return folder


def _grown(ws, task="t9", seed=9):
    net = store.load(ws)
    net.add_column(task, 3, seed=seed)
    net.freeze()
    return net


# Only a hang is detected with it (a FIFO opened for reading waits for ever), so the
# bound is generous: a slow, loaded machine must never read as a hang.
HANG_S = 120.0


def _in_thread(fn, seconds=HANG_S):
    """Run ``fn`` in a thread; ('hung', None) if it has not returned after ``seconds``."""
    box: dict = {}

    def run():
        try:
            box["result"] = ("ok", fn())
        except BaseException as exc:  # noqa: BLE001 - the test inspects what was raised
            box["result"] = ("raised", exc)

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    thread.join(seconds)
    return box.get("result", ("hung", None))


@pytest.fixture
def slow_manifest(monkeypatch):
    """Widen the window between a writer's read and its commit point, so races happen."""
    real = commit.write_durably

    def slow(folder, final, data):
        if final == "manifest.yaml":
            time.sleep(0.3)
        return real(folder, final, data)

    monkeypatch.setattr(commit, "write_durably", slow)


def test_two_threads_saving_to_one_workspace_never_break_it(tmp_path, slow_manifest):
    """Python API users saving from two threads: the second waits for the first (a flock
    conflicts between two opens even in one process), then is refused as stale; before,
    the lock counted as re-entrant across threads and the workspace lost its weights."""
    ws = _ws(tmp_path / "ws")
    a, b = _grown(ws, "ta", 1), _grown(ws, "tb", 2)
    results = {}
    threads = [threading.Thread(target=lambda n=n, k=k: results.__setitem__(
        k, _in_thread(lambda: store.save(n, ws))[0])) for n, k in ((a, "a"), (b, "b"))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(results.values()) == ["ok", "raised"]
    winner = "ta" if results["a"] == "ok" else "tb"
    assert store.load(ws).tasks == ["t0", winner]
    assert verify_record(ws).findings == []


def test_a_child_forked_by_a_writer_does_not_keep_the_lock(tmp_path):
    """A DataLoader worker forked by a writer inherits the lock's descriptor (fork without
    exec ignores O_CLOEXEC); before, it kept the lock held after the writer died."""
    ws = tmp_path / "ws"
    ws.mkdir()
    read_end, write_end = os.pipe()
    # The worker lives until the test lets it go (closes ``release``), not for a time:
    # before, it slept 5 s, and a test slower than that checked a lock nobody could hold.
    release, released = os.pipe()
    writer = os.fork()
    if writer == 0:
        try:
            with writer_lock(ws, "grow", 0):
                worker = os.fork()
                if worker == 0:
                    os.close(released)
                    os.read(release, 1)  # returns when every write end is closed
                    os._exit(0)
                os.write(write_end, str(worker).encode())
        finally:
            os._exit(0)  # the writer dies holding the lock; its worker lives on
    os.close(release)
    os.waitpid(writer, 0)
    worker = int(os.read(read_end, 64))
    try:
        assert os.path.exists(f"/proc/{worker}")
        with writer_lock(ws, "seal", 0):  # BusyError here was the hole
            pass
        assert os.path.exists(f"/proc/{worker}")  # it still held its copy all along
    finally:
        os.close(released)  # the worker (a grandchild, reaped by init) ends


def test_a_lock_file_that_is_a_fifo_or_a_folder_is_never_waited_on(tmp_path):
    ws = _ws(tmp_path / "ws")
    os.unlink(ws / ".reader.lock")
    os.mkfifo(ws / ".reader.lock")  # before: open() for reading waited forever
    kind, value = _in_thread(lambda: store.load(ws).tasks)
    assert (kind, value) == ("ok", ["t0"])
    assert verify_record(ws).findings == []
    for make, remove in ((os.mkfifo, os.unlink), (os.mkdir, os.rmdir)):
        os.unlink(ws / ".writer.lock")
        make(ws / ".writer.lock")
        kind, exc = _in_thread(lambda: store.save(_grown(ws), ws))
        assert kind == "raised" and isinstance(exc, WorkspaceError), exc
        assert "is not a regular file" in str(exc) and "remove it" in str(exc)
        assert store.load(ws).tasks == ["t0"]
        remove(ws / ".writer.lock")
        (ws / ".writer.lock").touch()


def test_a_writer_lock_hard_linked_to_a_users_file_is_refused_and_the_file_kept(tmp_path):
    """Before: the holder's note was written into the linked file and then emptied."""
    ws = _ws(tmp_path / "ws")
    victim = tmp_path / "notes.txt"
    victim.write_text("a file of the user's\n")
    os.unlink(ws / ".writer.lock")
    os.link(victim, ws / ".writer.lock")
    before = _listing(ws)
    with pytest.raises(WorkspaceError, match="is a hard link to another file"):
        store.save(_grown(ws), ws)
    assert victim.read_text() == "a file of the user's\n"
    assert _listing(ws) == before


@pytest.mark.parametrize("note", [
    '{"carries":' * 100_000 + "{}" + "}" * 100_000,  # before: RecursionError traceback
    '{"carries":' * 900 + '{"verb": "grow"}' + "}" * 900,  # parses; was carried deeper
    json.dumps({"verb": "v" * 500_000, "host": ["h"] * 1000, "to_head": {"x": 1}}),
    "\xff not json",
])
def test_a_crafted_pending_note_is_recorded_in_bounded_words(tmp_path, note):
    ws = _ws(tmp_path / "ws")
    (ws / ".pending").write_bytes(note.encode("utf-8", "surrogateescape"))
    store.save(_grown(ws), ws)
    back = store.load(ws)
    assert back.tasks == ["t0", "t9"]
    found = [e for e in back.meta["history"] if e.get("step") == "recovered"]
    assert len(found) == 1 and 1 <= len(found[0]["found"]) <= 16
    assert all(len(line) < 400 for line in found[0]["found"])
    assert (ws / "manifest.yaml").stat().st_size < 20_000  # not 500 KB of someone's text
    assert not (ws / ".pending").exists()
    assert verify_record(ws).findings == []


def test_a_pending_note_that_is_a_folder_is_refused_in_one_sentence(tmp_path):
    ws = _ws(tmp_path / "ws")
    (ws / ".pending").mkdir()
    before = snapshot(ws)
    with pytest.raises(WorkspaceError, match=r"\.pending: is a folder.*remove it"):
        store.save(_grown(ws), ws)
    assert snapshot(ws) == before


def test_a_folder_in_place_of_a_new_data_file_is_refused_and_nothing_moves(tmp_path):
    ws = _ws(tmp_path / "ws")
    net = _grown(ws)
    weights = store._tensor_files(net)["weights.safetensors"]
    (ws / "data" / f"weights.{hashlib.sha256(weights).hexdigest()}.safetensors").mkdir()
    before = snapshot(ws)
    with pytest.raises(WorkspaceError, match="is a folder where colonnade keeps a data file"):
        store.save(net, ws)
    assert snapshot(ws) == before
    assert store.load(ws).tasks == ["t0"]


def test_a_fifo_in_place_of_a_data_file_is_reported_missing_not_waited_on(tmp_path):
    """Held before any fix: readers test for a regular file before opening."""
    ws = _ws(tmp_path / "ws")
    (stored,) = (ws / "data").iterdir()
    stored.unlink()
    os.mkfifo(stored)
    kind, exc = _in_thread(lambda: store.load(ws))
    assert kind == "raised" and "missing" in str(exc)
    kind, report = _in_thread(lambda: verify_record(ws))
    assert kind == "ok" and "missing" in report.findings[0].message


def test_check_reads_a_manifest_that_claims_gigabytes_in_bounded_memory(tmp_path):
    """Before: ``check`` read the whole (sparse, 8 GiB) manifest to compare its bytes."""
    ws = _ws(tmp_path / "ws")
    with open(ws / "manifest.yaml", "r+b") as handle:
        handle.truncate(8 << 30)
    child = os.fork()
    if child == 0:
        code = 3
        try:
            # Allow 1 GiB more than this process maps now: far less than the file.
            with open("/proc/self/statm") as statm:
                mapped = int(statm.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
            resource.setrlimit(resource.RLIMIT_AS, (mapped + (1 << 30), mapped + (1 << 30)))
            findings = verify_record(ws).findings
            code = 0 if "more than the" in findings[0].message else 1
        except MemoryError:
            code = 2
        finally:
            os._exit(code)
    _, status = os.waitpid(child, 0)
    assert os.WEXITSTATUS(status) == 0


def test_a_failed_save_leaves_the_network_in_memory_as_it_was(tmp_path, monkeypatch):
    """A save that fails before its commit point (a full disk) and is retried records one
    recovery, not two, and no entry of the commit that never was."""
    ws = _ws(tmp_path / "ws")
    (ws / ".pending").write_text(json.dumps({"verb": "grow", "pid": 1, "to_head": "x"}))
    net = _grown(ws)
    history = json.dumps(net.meta["history"])
    real = os.replace

    def full(src, dst):
        if str(dst).endswith("manifest.yaml"):
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(src, dst)

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(OSError):
        store.save(net, ws)
    monkeypatch.setattr(os, "replace", real)
    assert json.dumps(net.meta["history"]) == history
    store.save(net, ws)
    steps = [e["step"] for e in store.load(ws).meta["history"]]
    assert steps.count("recovered") == 1
    assert verify_record(ws).findings == []


def test_two_creates_racing_for_one_folder_never_both_succeed(tmp_path, monkeypatch):
    """Two processes creating one workspace: before, both checked the folder empty, both
    said they created it, and the second replaced the first's workspace."""

    class SlowToBuild(ProgressiveNet):  # both find the folder empty before either writes
        def __init__(self, *args, **kwargs):
            time.sleep(0.3)
            super().__init__(*args, **kwargs)

    monkeypatch.setattr(store, "ProgressiveNet", SlowToBuild)
    ws = tmp_path / "ws"
    specs = {7: SPEC, 9: {**SPEC, "input": [5]}}
    children = []
    for code, spec in specs.items():
        pid = os.fork()
        if pid == 0:
            result = 1
            try:
                store.create(spec, ws)
                result = code
            except (WorkspaceError, BusyError):
                result = 0
            finally:
                os._exit(result)
        children.append(pid)
    codes = sorted(os.WEXITSTATUS(os.waitpid(pid, 0)[1]) for pid in children)
    assert codes[0] == 0 and codes[1] in specs  # one created it, the other was refused
    assert store.load(ws).spec.to_dict()["input"] == specs[codes[1]]["input"]


def _listing(ws):
    return {k: v for k, v in snapshot(ws).items() if k not in LOCKS}


def test_a_full_disk_at_every_step_of_a_commit_keeps_the_old_generation(tmp_path, monkeypatch):
    """ENOSPC from each file-system call of a save in turn (an interrupted commit waiting
    to be recorded, so the note is rewritten too): the workspace stays the old generation
    byte for byte or holds the new one whole, and the next save leaves no garbage. Held
    before any fix (a real 1 MiB tmpfs filled to each margin agreed; see the note)."""
    names = ("write", "fsync", "replace", "open", "mkdir", "unlink")
    real = {name: getattr(os, name) for name in names}
    base = _ws(tmp_path / "base")
    outcomes = []
    for step in range(1, 200):
        ws = tmp_path / f"ws{step}"
        os.rename(base, ws)
        base = _ws(tmp_path / "base")  # the next case's copy, made while nothing fails
        (ws / ".pending").write_text(json.dumps({"verb": "grow", "pid": 1, "to_head": "x"}))
        before = _listing(ws)
        net = _grown(ws)
        calls = [0]

        def failing(name, calls=calls, step=step):
            def call(*args, **kwargs):
                calls[0] += 1
                if calls[0] == step:
                    raise OSError(errno.ENOSPC, "No space left on device")
                return real[name](*args, **kwargs)
            return call

        for name in names:
            monkeypatch.setattr(os, name, failing(name))
        try:
            store.save(net, ws)
            failed = False
        except (OSError, WorkspaceError):  # the lock file's open says it in one sentence
            failed = True
        finally:
            for name in names:
                monkeypatch.setattr(os, name, real[name])
        if calls[0] < step:
            break  # every call has failed once
        tasks = store.load(ws).tasks
        assert (tasks == ["t0"] and _listing(ws) == before) if failed else tasks == ["t0", "t9"]
        assert verify_record(ws).findings == []
        store.save(_grown(ws, "t8", 8), ws)
        assert sorted(os.listdir(ws)) == sorted([*LOCKS, "data", "manifest.yaml"])
        assert len(os.listdir(ws / "data")) == 1
        outcomes.append(failed)
    assert len(outcomes) > 20 and any(outcomes) and not all(outcomes)


def test_sigterm_at_each_step_of_a_recovery_loses_nothing(tmp_path):
    """SIGTERM (default action: the process ends, no unwinding) at each file-system call
    of ``colonnade recover``: held before any fix, like SIGKILL in test_crash."""
    names = ("write", "fsync", "replace", "open", "mkdir", "unlink")
    base = _ws(tmp_path / "base", tasks=2)
    held = 0
    for step in range(1, 200, 3):
        ws = tmp_path / f"ws{step}"
        os.rename(base, ws)
        base = _ws(tmp_path / "base", tasks=2)
        (ws / ".pending").write_text(json.dumps({"verb": "grow", "pid": 1, "to_head": "x"}))
        pid = os.fork()
        if pid == 0:
            signal.signal(signal.SIGTERM, signal.SIG_DFL)
            calls = [0]

            def wrap(fn, calls=calls, step=step):
                def call(*args, **kwargs):
                    calls[0] += 1
                    if calls[0] == step:
                        os.kill(os.getpid(), signal.SIGTERM)
                    return fn(*args, **kwargs)
                return call

            for name in names:
                setattr(os, name, wrap(getattr(os, name)))
            recover(ws)
            os._exit(7)
        _, status = os.waitpid(pid, 0)
        if os.WIFEXITED(status):
            assert os.WEXITSTATUS(status) == 7
            break
        assert os.WTERMSIG(status) == signal.SIGTERM
        assert store.load(ws).tasks == ["t0", "t1"]
        assert verify_record(ws).findings == []
        recover(ws)  # the next writer finishes it and records it
        assert not (ws / ".pending").exists() and verify_record(ws).findings == []
        held += 1
    assert held > 5


def test_a_network_loaded_over_a_changed_file_is_never_saved(tmp_path):
    """``load(strict=False)`` (what ``check`` uses) loads a file changed outside colonnade
    so that it can be named; before, saving that network gave the changed bytes a fresh
    digest and head, and ``check`` passed afterwards."""
    ws = _ws(tmp_path / "ws")
    (weights,) = (ws / "data").iterdir()
    damaged = bytearray(weights.read_bytes())
    damaged[-1] ^= 1
    weights.write_bytes(bytes(damaged))
    net = store.load(ws, strict=False)
    assert net.meta["_mismatched"] == ["weights.safetensors"]
    before = _listing(ws)
    with pytest.raises(WorkspaceError, match="refusing to save a network whose file"):
        store.save(net, ws)
    assert _listing(ws) == before
    assert "does not match" in verify_record(ws).findings[0].message


def test_a_network_loaded_over_a_hand_edited_manifest_is_never_saved(tmp_path):
    """Before: a section added to the manifest by hand, loaded with strict=False and saved,
    was bound to a fresh head, and ``check`` passed on the forged section afterwards."""
    ws = _ws(tmp_path / "ws")
    text = (ws / "manifest.yaml").read_text()
    assert "records: {}" in text
    (ws / "manifest.yaml").write_text(text.replace("records: {}", "records: {t0: {by: forged}}"))
    net = store.load(ws, strict=False)
    before = _listing(ws)
    with pytest.raises(WorkspaceError, match="from a record that does not verify"):
        store.save(net, ws)
    assert _listing(ws) == before
    assert any("records/t0" in f.message for f in verify_record(ws).findings)


def test_a_reader_lock_held_for_ever_stops_readers_in_one_sentence(tmp_path, monkeypatch):
    """Anyone who may read ``.reader.lock`` can flock it exclusively (flock(2) needs only a
    descriptor); before, every ``check``, ``show`` and ``load`` then waited for ever."""
    ws = _ws(tmp_path / "ws")
    monkeypatch.setattr(lock, "READER_WAIT", 0.3, raising=False)
    holder = os.open(ws / ".reader.lock", os.O_RDONLY)
    try:
        fcntl.flock(holder, fcntl.LOCK_EX)
        kind, exc = _in_thread(lambda: store.load(ws))
        assert kind == "raised" and isinstance(exc, BusyError), (kind, exc)
        assert "reader lock" in str(exc) and exc.exit_code == 3
    finally:
        os.close(holder)
    assert store.load(ws).tasks == ["t0"]


def test_listed_files_larger_than_the_machine_can_load_are_refused_unread(tmp_path,
                                                                         monkeypatch):
    """A sparse weights file claiming far more than memory, with a manifest that records
    that very size: refused from the recorded sizes before a byte of it is read."""
    ws = _ws(tmp_path)
    weights = store.listed_files(ws)["weights.safetensors"]
    monkeypatch.setattr(store, "tensor_budget", lambda: weights.stat().st_size)
    store.load(ws)  # within the budget: loads
    monkeypatch.setattr(store, "tensor_budget", lambda: weights.stat().st_size // 2)
    with pytest.raises(WorkspaceError, match="more than this machine can load"):
        store.load(ws, strict=False)
