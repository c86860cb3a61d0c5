"""Hostile workspaces: each case of issue 12's item 5 that a manifest or a killed parent
can cause, run as a real ``colonnade`` process under a memory limit.

Every case copies a small real workspace, damages the copy the way an adversary would
(re-chaining the record afterwards where the damage would otherwise be caught by the
chain alone, so that the check under test is the one that answers), and asserts what a
user must see: one sentence on stderr and no traceback, a non-zero exit, nothing written
anywhere in the folder that holds the workspace, and an answer within the timeout.

The memory limit is the operating system's own: ``resource.setrlimit(RLIMIT_AS)`` in the
child (POSIX setrlimit(2)); 3 GiB leaves torch room to import (its import maps about
0.6 GiB here, measured with /proc/self/status VmPeak) while a YAML alias bomb or an
allocation of terabytes would fail under it. The bomb is the "billion laughs" pattern:
nine levels of ten aliases, 10**9 values in a few hundred bytes.
"""

from __future__ import annotations

import os
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import yaml
from conftest import snapshot

import colonnade
from colonnade.app.distributed_grow import GrowRequest, grow_distributed
from colonnade.cli import main
from colonnade.evidence import record
from colonnade.files.manifest import MANIFEST, MAX_MANIFEST_BYTES, manifest_text, read_manifest

MEMORY_LIMIT = 3 << 30
# Only a hang is detected here, so the bound is generous: torch's import alone took 9.4 s
# (measured here, `time python -c "import torch"`, with two busy loops on the 2 cores),
# and `grow --nproc 2` starts three processes that each import it.
TIMEOUT_S = 180

SPEC = {"name": "tiny", "input": [8], "column": [{"dense": 6}, {"act": "relu"}, {"dense": 6}],
        "train": {"epochs": 1, "batch_size": 32, "seed": 0}}


@pytest.fixture(scope="module")
def workspace(tmp_path_factory) -> Path:
    """A real workspace: two grown tasks, the first sealed on a probe kept inside it."""
    tmp = tmp_path_factory.mktemp("hostile")
    rng = np.random.default_rng(0)
    x = rng.normal(size=(120, 8)).astype(np.float32)
    y = (x[:, 0] > 0).astype(np.int64)
    np.savez(tmp / "train.npz", x=x, y=y)
    np.savez(tmp / "probe.npz", x=x[:24], y=y[:24])
    (tmp / "spec.yaml").write_text(yaml.safe_dump(SPEC))
    ws = tmp / "ws"
    colonnade.new_workspace(tmp / "spec.yaml", ws)
    colonnade.grow_workspace(ws, "a", tmp / "train.npz", progress=False)
    colonnade.grow_workspace(ws, "b", tmp / "train.npz", progress=False)
    colonnade.seal_workspace(ws, "a", tmp / "probe.npz", accept_low_accuracy=True)
    return ws


def _copy(workspace: Path, tmp_path: Path) -> Path:
    """A copy of the workspace alone in a parent folder, so the parent can be snapshot."""
    ws = tmp_path / "parent" / "ws"
    shutil.copytree(workspace, ws)
    return ws


def _rechained(ws: Path, edit) -> Path:
    """``edit`` the parsed manifest and commit it as a forger would: the record extended
    over the edited state, so that only the check under test can refuse it."""
    manifest = read_manifest(ws)
    edit(manifest)
    record.extend(manifest, record.Attribution(verb="hand-edit"))
    (ws / MANIFEST).write_text(manifest_text(manifest), encoding="utf-8")
    return ws


def _limited() -> None:
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY_LIMIT, MEMORY_LIMIT))


def _colonnade(*argv: str | Path, timeout: float = TIMEOUT_S) -> subprocess.CompletedProcess:
    """``python -m colonnade ARGV`` (the console script's own entry) under the memory limit."""
    return subprocess.run([sys.executable, "-m", "colonnade", *map(str, argv)],
                          capture_output=True, text=True, timeout=timeout, preexec_fn=_limited)


def _refused(ws: Path, *argv: str | Path, expect: str, report: bool = False) -> str:
    """Run a verb on the hostile copy; assert one sentence, non-zero, nothing written.

    ``report``: the verb is ``check`` on a record it cannot read, which it reports on
    stdout as its verdict (``record: SENTENCE.``) rather than as an error on stderr.
    """
    parent = ws.parent
    before = snapshot(parent)
    proc = _colonnade(*argv)
    assert proc.returncode != 0, proc.stdout + proc.stderr
    for text in (proc.stdout, proc.stderr):
        assert "Traceback" not in text and "MemoryError" not in text, text
    if report:
        assert proc.stderr == "", proc.stderr
        lines = [line for line in proc.stdout.splitlines() if expect in line]
        assert len(lines) == 1 and lines[0].startswith("record: "), proc.stdout
    else:
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("colonnade: error: "), proc.stderr
        assert expect in lines[0], lines[0]
    assert snapshot(parent) == before  # nothing written, inside the workspace or beside it
    return lines[0]


def _laughs(indent: str, first: str) -> str:
    """Nine levels of ten aliases under ``first`` (a key or a list item), 10**9 values."""
    text = f"{indent}{first}\n{indent}  l0: &l0 [lol, lol, lol, lol, lol, lol, lol, lol, lol, lol]\n"
    for level in range(1, 10):
        text += f"{indent}  l{level}: &l{level} [" + ", ".join([f"*l{level - 1}"] * 10) + "]\n"
    return text


# ----------------------------------------------------------------------- alias bombs
def test_alias_bomb_in_history_is_refused_by_show(workspace, tmp_path):
    ws = _copy(workspace, tmp_path)
    text = (ws / MANIFEST).read_text()
    assert "\nhistory:\n" in text
    (ws / MANIFEST).write_text(text.replace("\nhistory:\n",
                                                   "\nhistory:\n" + _laughs("", "- laughs:"), 1))
    line = _refused(ws, "show", ws, "--json", expect="YAML anchor")
    assert "edited by hand" in line


def test_alias_bomb_in_a_seal_entry_is_refused_by_check(workspace, tmp_path):
    ws = _copy(workspace, tmp_path)
    text = (ws / MANIFEST).read_text()
    entry = "\nseals:\n  a:\n  - version: 1\n"
    assert entry in text
    (ws / MANIFEST).write_text(text.replace(entry, entry + _laughs("    ", "laughs:"), 1))
    _refused(ws, "check", ws, expect="YAML anchor", report=True)


def test_a_manifest_over_the_size_limit_is_refused_unread(workspace, tmp_path):
    ws = _copy(workspace, tmp_path)
    # A sparse file: its size is past the limit while it takes no room on disk.
    os.truncate(ws / MANIFEST, MAX_MANIFEST_BYTES + 1)
    line = _refused(ws, "show", ws, expect="more than the")
    assert f"{MAX_MANIFEST_BYTES:,} bytes" in line


# ----------------------------------------------------------------------- sizes
def _set(section: str, index: int, key: str, value):
    def edit(manifest):
        if section == "spec":
            manifest["spec"]["column"][index][key] = value
        else:
            manifest["network"][section][index][key] = value
    return edit


@pytest.mark.parametrize("edit,expect", [
    (_set("tasks", 0, "classes", 10**12), "network.tasks[0].classes"),
    (_set("columns", 1, "width", 1e9), "network.columns[1].width"),
    (_set("spec", 0, "dense", 2**40), "column[0].dense"),
], ids=["classes-10**12", "width-1e9", "dense-2**40"])
def test_huge_sizes_in_the_manifest_are_refused_before_allocation(workspace, tmp_path, edit,
                                                                  expect):
    ws = _rechained(_copy(workspace, tmp_path), edit)
    _refused(ws, "check", ws, expect=expect)


@pytest.mark.parametrize("edit,expect", [
    (_set("tasks", 1, "classes", -3), "network.tasks[1].classes"),
    (_set("spec", 2, "dense", -6), "column[2].dense: expected a positive integer, got -6"),
], ids=["classes-negative", "dense-negative"])
def test_negative_sizes_are_refused(workspace, tmp_path, edit, expect):
    ws = _rechained(_copy(workspace, tmp_path), edit)
    _refused(ws, "grow", ws, "--task", "c", "--train", workspace.parent / "train.npz",
             expect=expect)


@pytest.mark.parametrize("edit,expect", [
    (_set("tasks", 0, "classes", 2.5), "tasks[0].classes: expected a whole number from 1 to "
                                       "65,536, got 2.5"),
    (_set("tasks", 0, "classes", "10"), "tasks[0].classes: expected a whole number"),
    (_set("columns", 0, "width", 0), "columns[0].width: expected a width factor in (0, 16]"),
    (_set("columns", 0, "index", 5), "columns[0].index: expected a whole number from 0 to 0"),
], ids=["classes-fraction", "classes-text", "width-zero", "index-elsewhere"])
def test_sizes_of_the_wrong_kind_are_named(workspace, tmp_path, edit, expect):
    """The same checks in-process (no subprocess needed to read one sentence)."""
    ws = _rechained(_copy(workspace, tmp_path), edit)
    with pytest.raises(colonnade.WorkspaceError) as err:
        colonnade.load(ws)
    assert expect in str(err.value) and "edited by hand" in str(err.value)


def test_a_network_past_the_machines_memory_is_refused(workspace, tmp_path):
    """Each size within its own bound, the whole too big: the template at width 16 holds
    about 4.3e9 weights (17 GiB as float32), past half of the 3 GiB the process may map."""
    def edit(manifest):
        manifest["spec"]["column"][0]["dense"] = 4096
        manifest["spec"]["column"][2]["dense"] = 4096
        manifest["network"]["columns"][1]["width"] = 16.0

    ws = _rechained(_copy(workspace, tmp_path), edit)
    line = _refused(ws, "check", ws, expect="the manifest's network needs")
    assert "more than half of this machine's memory (1.5 GiB)" in line


# ----------------------------------------------------------------------- grow --nproc
def _children(pid: int) -> list[int]:
    """Child pids of ``pid``, from Linux's /proc/PID/task/TID/children (proc(5))."""
    found = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            found += [int(c) for c in (task / "children").read_text().split()]
        except OSError:
            pass
    return found


def _gone(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return True
    return state == "Z"  # a zombie has exited; only its parent's wait is missing


def _answers_sigint(pid: int) -> bool:
    """Whether ``pid`` has a handler for SIGINT now, neither ignoring it nor left to the
    default: from the SigIgn and SigCgt masks of /proc/PID/status (proc(5); bit n-1 is
    signal n)."""
    try:
        fields = dict(line.split(":", 1) for line in
                      Path(f"/proc/{pid}/status").read_text().splitlines() if ":" in line)
    except OSError:
        return False
    bit = 1 << (signal.SIGINT - 1)
    return not int(fields["SigIgn"], 16) & bit and bool(int(fields["SigCgt"], 16) & bit)


def _start_nproc_grow(ws: Path, train: Path) -> tuple[subprocess.Popen, list[int]]:
    """``grow --nproc 2`` in its own process group, returned once both workers exist and
    the parent answers Ctrl-C again: it ignores SIGINT while it creates the workers (the
    moment _run_workers documents), and a worker appears in /proc before that ends."""
    proc = subprocess.Popen([sys.executable, "-m", "colonnade", "grow", str(ws), "--task",
                             "c", "--train", str(train), "--nproc", "2", "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            preexec_fn=_limited, start_new_session=True)
    deadline = time.monotonic() + TIMEOUT_S
    workers: list[int] = []
    while time.monotonic() < deadline and proc.poll() is None:
        if list(ws.glob(".colonnade-ddp-*")):
            workers = [c for c in _children(proc.pid) if "spawn_main" in
                       Path(f"/proc/{c}/cmdline").read_text(errors="ignore")]
            if len(workers) == 2 and _answers_sigint(proc.pid):
                return proc, workers
        time.sleep(0.05)
    proc.kill()
    raise AssertionError(f"the two workers never started: {proc.communicate()[1]}")


def _all_gone(pids: list[int], within: float = TIMEOUT_S) -> bool:
    deadline = time.monotonic() + within
    while time.monotonic() < deadline and not all(_gone(p) for p in pids):
        time.sleep(0.05)
    return all(_gone(p) for p in pids)


needs_proc = pytest.mark.skipif(not Path("/proc/self/task").is_dir(), reason="needs Linux's /proc")


@needs_proc
def test_a_killed_nproc_parent_leaves_no_worker_and_nothing_beside_the_workspace(
        workspace, tmp_path):
    ws = _copy(workspace, tmp_path)
    parent = ws.parent
    beside = {p.name for p in parent.iterdir()}
    proc, workers = _start_nproc_grow(ws, workspace.parent / "train.npz")
    try:
        proc.kill()  # SIGKILL: no handler, no cleanup in the parent
        proc.wait(timeout=TIMEOUT_S)
        assert _all_gone(workers, within=TIMEOUT_S), "a worker outlived its killed parent"
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.communicate()
    assert {p.name for p in parent.iterdir()} == beside  # nothing beside the workspace
    left = list(ws.glob(".colonnade-ddp-*"))
    assert len(left) == 1 and left[0].is_dir()  # inside it, where the next run finds it
    # The parent died while the workers were still starting: they stopped as soon as they
    # could tell, before training, so no orphaned rank 0 wrote a result there.
    assert list(left[0].iterdir()) == []
    # The next run removes it: here one that then stops (task 'a' exists already), so
    # the test does not train again, called in-process as the command line calls it.
    with pytest.raises(colonnade.UsageError, match="exists already"):
        grow_distributed(GrowRequest(str(ws), "a", str(workspace.parent / "train.npz")), 2)
    assert not list(ws.glob(".colonnade-ddp-*"))
    assert {p.name for p in parent.iterdir()} == beside


@needs_proc
def test_ctrl_c_on_the_terminal_during_nproc_grow_is_one_sentence(workspace, tmp_path):
    """A terminal's Ctrl-C reaches the whole foreground process group, workers included,
    here while they are still importing torch: only the parent answers, in one sentence."""
    ws = _copy(workspace, tmp_path)
    before = snapshot(ws.parent)
    proc, workers = _start_nproc_grow(ws, workspace.parent / "train.npz")
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=TIMEOUT_S)
    assert proc.returncode == 130, err
    assert err == "colonnade: interrupted; the workspace is unchanged\n"
    assert _all_gone(workers)
    assert snapshot(ws.parent) == before  # staging folder removed, workspace as it was


# ----------------------------------------------------------------------- Ctrl-C
def test_ctrl_c_during_startup_prints_one_sentence():
    """The handler ``colonnade._startup`` installs answers a SIGINT that lands while the
    command line is being imported (sent here at a known moment, by the process itself)."""
    code = ("import os, signal, colonnade._startup\n"
            "os.kill(os.getpid(), signal.SIGINT)\n"
            "import colonnade.cli.main\n"
            "print('not reached')\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=TIMEOUT_S)
    assert proc.returncode == 130
    assert proc.stderr == "colonnade: interrupted while starting; nothing was changed\n"
    assert "not reached" not in proc.stdout


def test_the_console_script_starts_through_the_startup_handler():
    tomllib = pytest.importorskip("tomllib")
    pyproject = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())
    assert pyproject["project"]["scripts"]["colonnade"] == "colonnade._startup:main"
    main_module = Path(colonnade.__file__).with_name("__main__.py").read_text()
    assert "from ._startup import main" in main_module


def test_an_interrupt_caught_after_a_nested_evaluation_still_exits_130(tmp_path):
    """CPython marks a KeyboardInterrupt that leaves code run through ``PyRun_String``
    (as C extensions do while torch loads) as unhandled even when the command line
    catches it later, and under ``python -m`` then ends the process by SIGINT (a return
    code of -2, seen once in CI). The interrupt is injected here through that very C
    call, found with ctypes, at the moment the command line builds its parser."""
    (tmp_path / "nested_interrupt.py").write_text(
        "import ctypes, sys\n"
        "import colonnade._startup\n"
        "import importlib\n"
        "cli = importlib.import_module('colonnade.cli.main')  # the module, not the function\n"
        "run = ctypes.pythonapi.PyRun_String\n"
        "run.restype = ctypes.py_object\n"
        "run.argtypes = [ctypes.c_char_p, ctypes.c_int, ctypes.py_object, ctypes.py_object]\n"
        "def interrupted_parser():\n"
        "    run(b'raise KeyboardInterrupt', 257, {}, {})  # 257: Py_file_input\n"
        "cli.build_parser = interrupted_parser\n"
        "colonnade._startup.main()\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(tmp_path), str(Path(colonnade.__file__).parents[1]), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.run([sys.executable, "-m", "nested_interrupt"], capture_output=True,
                          text=True, timeout=TIMEOUT_S, env=env)
    assert proc.returncode == 130, (proc.returncode, proc.stderr)
    assert proc.stderr == "colonnade: interrupted; the workspace is unchanged\n"


def _loading_torch(pid: int) -> bool:
    """Whether one of torch's shared libraries is mapped into ``pid`` (/proc/PID/maps,
    proc(5)): the verb is running, past colonnade's start-up, and importing torch."""
    try:
        return f"{os.sep}torch{os.sep}lib{os.sep}" in Path(f"/proc/{pid}/maps").read_text()
    except OSError:
        return False


@needs_proc
def test_ctrl_c_at_any_later_moment_prints_one_sentence(workspace, tmp_path):
    """Past the interpreter's own start-up, a SIGINT at any moment of a verb gets one
    sentence and exit 130, never a traceback. The moment is found, not timed: once the
    verb maps torch's libraries (a fixed delay of 0.5 s could land in the interpreter's
    own start-up on a loaded machine, where Python's default handler still reigns)."""
    ws = _copy(workspace, tmp_path)
    before = snapshot(ws.parent)
    proc = subprocess.Popen([sys.executable, "-m", "colonnade", "check", str(ws)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + TIMEOUT_S
    while proc.poll() is None and not _loading_torch(proc.pid) and time.monotonic() < deadline:
        time.sleep(0.01)  # polling only: the verdict does not depend on how long
    if proc.poll() is None and not _loading_torch(proc.pid):
        proc.kill()
        raise AssertionError(f"check did not load torch within {TIMEOUT_S} s")
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=TIMEOUT_S)
    if proc.returncode == 0:
        pytest.skip("check finished before the signal reached it")
    assert proc.returncode == 130, err
    assert err in ("colonnade: interrupted; the workspace is unchanged\n",
                   "colonnade: interrupted while starting; nothing was changed\n"), err
    assert snapshot(ws.parent) == before


def test_ctrl_c_after_the_commit_point_says_the_change_was_committed(workspace, monkeypatch,
                                                                     capsys):
    from colonnade.app import show
    from colonnade.errors import InterruptedAfterCommit

    def interrupted(*args, **kwargs):
        raise InterruptedAfterCommit()

    monkeypatch.setattr(show, "describe", interrupted)
    assert main(["show", str(workspace)]) == 130
    assert capsys.readouterr().err == ("colonnade: interrupted after the commit point; the "
                                       "change was committed and the workspace is whole\n")


def test_running_out_of_memory_anyway_is_one_sentence(workspace, monkeypatch, capsys):
    """What no bound foresaw: a MemoryError still ends in one sentence, exit 1."""
    from colonnade.app import show

    def exhausted(*args, **kwargs):
        raise MemoryError()

    monkeypatch.setattr(show, "describe", exhausted)
    assert main(["show", str(workspace)]) == 1
    assert capsys.readouterr().err == ("colonnade: error: this machine ran out of memory; the "
                                       "workspace keeps its last committed state\n")


# ----------------------------------------------------------------------- in-process bounds
def test_the_manifest_writer_never_writes_an_alias():
    """PyYAML writes ``&id001``/``*id001`` for an object that appears twice; the manifest
    writer spells it out twice instead, since the reader refuses every alias."""
    shared = {"sha256": "ab" * 32}
    manifest = {"format": "colonnade-workspace", "history": [shared, shared]}
    assert "&id" in yaml.safe_dump(manifest)  # the library's own behaviour, for contrast
    text = manifest_text(manifest)
    assert "&" not in text and "*" not in text
    assert yaml.safe_load(text) == manifest


def _spec_file(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "spec.yaml"
    path.write_text(text)
    return path


def test_a_hand_written_spec_may_use_a_few_aliases_but_not_a_bomb(tmp_path):
    from colonnade.model.spec import load_spec

    small = _spec_file(tmp_path, "input: [8]\ncolumn:\n- &layer {dense: 6}\n- {act: relu}\n"
                                 "- *layer\n")
    assert [layer.model_dump() for layer in load_spec(small).column][2] == {"dense": 6}
    bomb = _spec_file(tmp_path, "input: [8]\ncolumn: [{dense: 6}]\n" + _laughs("", "name:"))
    with pytest.raises(colonnade.SpecError, match="stands for more than 1,000,000 values"):
        load_spec(bomb)


@pytest.mark.parametrize("spec,expect", [
    # 2**31 - 1 units after 2**31 - 1 units: 4.6e18 weights, exabytes on any machine.
    ({"input": [8], "column": [{"dense": 2**31 - 1}, {"dense": 2**31 - 1}]},
     "the spec's column needs"),
    # A convolution keeping 2**31 - 1 positions in 2**31 - 1 channels: one sample's output
    # alone holds 4.6e18 values.
    ({"input": [1, 2**31 - 1], "column": [{"conv1d": 2**31 - 1, "kernel": 1},
                                          {"pool": "global_avg"}]},
     "column[0]: one sample's output has"),
    ({"input": [8], "column": [{"dense": 2**31}]},
     "column[0].dense: expected a positive integer of at most 2,147,483,647"),
], ids=["weights", "activation", "units"])
def test_a_spec_past_the_machine_is_refused_before_allocation(spec, expect):
    from colonnade.model.spec import parse_spec

    with pytest.raises(colonnade.SpecError) as err:
        parse_spec(spec)
    assert expect in str(err.value)


def test_a_manifest_packed_with_values_is_refused_while_scanned(workspace, tmp_path, monkeypatch):
    """Two bytes a value (``[1,1,...]``) would make a manifest under the size limit build
    millions of objects; the count is refused during the scan. The limit is lowered here
    (to 5,000) so the test writes kilobytes, not megabytes."""
    from colonnade.files import manifest as manifest_module

    monkeypatch.setattr(manifest_module, "MAX_MANIFEST_VALUES", 5_000)
    ws = _copy(workspace, tmp_path)
    with open(ws / MANIFEST, "a") as f:
        f.write("padding: [" + "1," * 6_000 + "1]\n")
    with pytest.raises(colonnade.WorkspaceError, match="holds more than 5,000 values"):
        read_manifest(ws)
    # The workspace as written (under a thousand values) still reads under that limit.
    assert read_manifest(_copy(workspace, tmp_path / "b"))["format"] == "colonnade-workspace"


def test_ctrl_c_during_a_real_commit_is_reported_as_committed(workspace, tmp_path,
                                                              monkeypatch, capsys):
    """``seal`` through the command line, with a real SIGINT sent at the commit's first
    fsync (the store holds Ctrl-C from there to the end of the commit): the seal is
    committed, and the sentence says so."""
    ws = _copy(workspace, tmp_path)
    real_fsync, calls = os.fsync, [0]

    def fsync_then_interrupt(fd):
        calls[0] += 1
        if calls[0] == 1:
            os.kill(os.getpid(), signal.SIGINT)  # as Ctrl-C sends it
        return real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fsync_then_interrupt)
    code = main(["seal", str(ws), "--task", "b", "--probe",
                 str(workspace.parent / "probe.npz"), "--accept-low-accuracy"])
    monkeypatch.setattr(os, "fsync", real_fsync)
    assert code == 130 and calls[0] > 1  # the commit went on after the signal
    assert capsys.readouterr().err == ("colonnade: interrupted after the commit point; the "
                                       "change was committed and the workspace is whole\n")
    assert "b" in read_manifest(ws)["seals"]  # committed, as the sentence says
