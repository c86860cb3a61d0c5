"""Staging folders a killed ``grow --nproc`` leaves inside a workspace are removed by the
next writer and by ``colonnade recover``, which says so; nothing outside is touched.

How a stale folder is known: ``grow --nproc`` makes its staging folder only while it
holds the writer lock and removes it before letting go, and the kernel releases a flock
when its holder dies (Linux flock(2)). So whoever takes the lock next knows that any
staging folder it finds is stale, whatever pid its name carries (pids are reused).
Symbolic links are never followed while removing (Python's documented
``shutil.rmtree.avoids_symlink_attacks``), checked here against files outside the
workspace that must survive.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import child_env

from colonnade.app.lifecycle import retire_workspace
from colonnade.app.record import verify_record
from colonnade.app.transaction import recovery
from colonnade.app.workspace import grow_workspace, new_workspace
from colonnade.files.manifest import read_manifest
from colonnade.files.staging import STAGING_PREFIX

ENV = child_env()
SPEC = ("input: [8]\ncolumn:\n  - dense: 12\n  - act: relu\nlateral: {kind: linear}\n"
        "train: {epochs: 2, batch_size: 32, seed: 0}\n")


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    root = tmp_path_factory.mktemp("staging")
    rng = np.random.default_rng(1)
    y = np.repeat(np.arange(3), 30)
    x = (rng.normal(size=(3, 8))[y] * 2 + rng.normal(size=(90, 8)) * 0.3).astype("float32")
    np.savez(root / "a.npz", x=x, y=y)
    (root / "spec.yaml").write_text(SPEC)
    ws = root / "ws"
    new_workspace(root / "spec.yaml", ws)
    grow_workspace(ws, "a", root / "a.npz", progress=False)
    return ws


@pytest.fixture
def ws(small, tmp_path):
    shutil.copytree(small, tmp_path / "ws")
    return tmp_path / "ws"


@pytest.fixture
def outside(tmp_path):
    """Files outside the workspace that links inside it point at: they must survive."""
    folder = tmp_path / "outside"
    folder.mkdir()
    (folder / "keep.txt").write_text("the user's own file")
    return folder


def _outside_intact(outside: Path) -> bool:
    return [p.name for p in outside.iterdir()] == ["keep.txt"] and \
        (outside / "keep.txt").read_text() == "the user's own file"


def _stale(ws: Path, outside: Path, pid: int) -> Path:
    """A staging folder as a killed run leaves it, with links to the outside inside."""
    staging = ws / f"{STAGING_PREFIX}{pid}-k1ll3d"
    (staging / "result" / "data").mkdir(parents=True)
    (staging / "result" / "data" / "weights.abc.safetensors").write_bytes(b"\0" * 64)
    (staging / "result" / ".writer.lock").write_text("")
    (staging / "to-folder").symlink_to(outside, target_is_directory=True)
    (staging / "result" / "to-file").symlink_to(outside / "keep.txt")
    os.mkfifo(staging / "pipe")
    return staging


def _cli(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "colonnade", *args], capture_output=True,
                          text=True, env=ENV, timeout=300)


def test_recover_removes_a_killed_runs_staging_folder_and_says_so(ws, outside):
    # Named with a live pid (this test's own): a pid in a name proves nothing, the lock
    # does. The code before kept every folder whose pid was alive.
    staging = _stale(ws, outside, os.getpid())
    head = read_manifest(ws)["record"]["head"]
    done = _cli("recover", str(ws))
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert f"removed 1 staging folder(s) left by a killed 'grow --nproc': {staging.name}" \
        in done.stdout, done.stdout
    assert "nothing recorded" in done.stdout
    assert not os.path.lexists(staging)
    assert _outside_intact(outside)
    assert read_manifest(ws)["record"]["head"] == head  # not part of the workspace
    assert verify_record(ws).passed


def test_entries_named_like_staging_that_are_no_folders_are_left_and_named(ws, outside):
    made = {f"{STAGING_PREFIX}1-file": "file", f"{STAGING_PREFIX}2-dirlink": "dirlink",
            f"{STAGING_PREFIX}3-filelink": "filelink", f"{STAGING_PREFIX}4-fifo": "fifo",
            f"{STAGING_PREFIX}5-dangling": "dangling"}
    for name, kind in made.items():
        path = ws / name
        if kind == "file":
            path.write_text("not colonnade's")
        elif kind == "dirlink":
            path.symlink_to(outside, target_is_directory=True)
        elif kind == "filelink":
            path.symlink_to(outside / "keep.txt")
        elif kind == "fifo":
            os.mkfifo(path)
        else:
            path.symlink_to(ws.parent / "nowhere")
    done = recovery(ws)
    assert done.found is None and done.swept.removed == []
    assert sorted(item.split(" ", 1)[0] for item in done.swept.left) == sorted(made)
    assert all(os.path.lexists(ws / name) for name in made)
    assert (ws / f"{STAGING_PREFIX}1-file").read_text() == "not colonnade's"
    assert _outside_intact(outside)
    line = _cli("recover", str(ws))
    assert line.returncode == 0 and "Traceback" not in line.stderr, line.stderr
    assert f"left {STAGING_PREFIX}1-file (not a folder colonnade made" in line.stdout


def test_any_writer_removes_stale_staging_folders(ws, outside):
    staging = _stale(ws, outside, 1)
    retire_workspace(ws, "a", reason="the pump line was closed")
    assert not os.path.lexists(staging)
    assert _outside_intact(outside)
    assert verify_record(ws).passed


HOLD = """
import sys
from colonnade.files.lock import writer_lock
from colonnade.files.staging import make_staging
with writer_lock(sys.argv[1], "grow"):
    print(make_staging(sys.argv[1]), flush=True)
    sys.stdin.read()
"""


def test_a_live_runs_staging_folder_is_never_swept(ws):
    """A run in progress holds the lock: nobody else sweeps, so its folder stays."""
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(ws)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True, env=ENV)
    try:
        staging = Path(holder.stdout.readline().strip())  # made, under the lock
        assert staging.name.startswith(STAGING_PREFIX) and staging.is_dir()
        busy = _cli("recover", str(ws), "--wait", "0")
        assert busy.returncode == 3, busy.stderr
        assert staging.is_dir()
    finally:
        holder.send_signal(signal.SIGKILL)  # killed like a parent: no clean-up of its own
        holder.wait()
    assert staging.is_dir()
    done = recovery(ws)
    assert done.swept.removed == [staging.name] and not staging.exists()
