"""A workspace survives a crash at any step of a commit, and a second crash after it.

Two fault injectors, both killing a real process without any clean-up:

- ``crash_driver.py`` (forked children dying by ``os._exit`` at the n-th file-system call
  the store makes while committing) covers every step of a grow's commit, every step of
  the next write's commit, and a sample of pairs (the full square is
  ``benchmarks/crash_pairs.py``);
- strace (``-e inject=SYSCALL:signal=KILL:when=N``, the strace manual's fault injection)
  kills the real ``colonnade seal`` command at real system calls, with nothing of ours
  in the loop.

After each case the workspace must open, its record must verify, every sealed task must
check ``exact``, no committed task may be missing, a commit that passed its commit point
must be present, and the next writer must record what it recovered.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import child_env, strace_path

HERE = Path(__file__).resolve().parent


def _driver(base: Path, out: Path, cases) -> list[dict]:
    env = child_env()
    done = subprocess.run([sys.executable, str(HERE / "crash_driver.py"), str(base), str(out),
                           json.dumps(cases)], capture_output=True, text=True, env=env,
                          timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    return [json.loads(line) for line in done.stdout.splitlines() if line.startswith("{")]


@pytest.fixture(scope="module")
def crash_base(tmp_path_factory):
    base = tmp_path_factory.mktemp("crash-base")
    (clean,) = _driver(base, base / "out", "count")
    assert clean["problems"] == [] and clean["recovered"] is None
    return base, clean


def _commit_step(trace: list[str]) -> int:
    """The 1-based step that renames the new manifest into place: the commit point."""
    return trace.index("replace manifest.yaml") + 1


def test_a_crash_at_every_step_of_a_commit_and_of_the_next_write(crash_base, tmp_path):
    base, clean = crash_base
    grow_steps, seal_steps = clean["first_steps"], clean["second_steps"]
    assert grow_steps >= 15 and seal_steps >= 15  # pending, data files, manifest, clean-up
    commit = _commit_step(clean["first_trace"])
    cases = [[i, None] for i in range(1, grow_steps + 1)]
    cases += [[None, j] for j in range(1, seal_steps + 1)]
    results = _driver(base, tmp_path, cases)
    assert len(results) == len(cases)
    for case in results:
        assert case["problems"] == [], case
        if case["first"] is not None:
            # Killed before the manifest's rename ran: the grow did not commit, and the
            # next write grew the task itself; killed after it: the grow's task is there
            # and the next write sealed it.
            expected = "seal" if case["first"] > commit else "grow"
            assert case["second_kind"] == expected, case
            if case["first"] > commit:
                assert case["recovered"] is None or "had committed" in case["recovered"]
    recovered = [c for c in results if c["recovered"]]
    assert recovered, "no case left an interrupted write for the next writer to record"
    print(f"crash singles: {len(results)} tried, {len(results)} held "
          f"(grow {grow_steps} steps, seal {seal_steps} steps, commit point at step {commit})")


def test_a_crash_in_a_write_and_another_in_the_next_write(crash_base, tmp_path):
    base, clean = crash_base
    grow_steps, seal_steps = clean["first_steps"], clean["second_steps"]
    # A sample spread over the whole square: every first step once, each with a different
    # second step (the full square is benchmarks/crash_pairs.py).
    cases = [[i, 1 + (7 * i) % seal_steps] for i in range(1, grow_steps + 1, 2)]
    results = _driver(base, tmp_path, cases)
    assert len(results) == len(cases)
    for case in results:
        assert case["problems"] == [], case
    print(f"crash pairs (sample): {len(results)} tried, {len(results)} held")


# ------------------------------------------------------------------ every writing verb
VERBS = ["new", "adopt", "grow", "seal", "seal-signed", "unseal", "usage", "trim", "retrain",
         "retire", "record-start", "recover", "export"]


def _verbs_driver(base: Path, out: Path, plan) -> list[dict]:
    env = child_env()
    done = subprocess.run([sys.executable, str(HERE / "crash_verbs.py"), str(base), str(out),
                           json.dumps(plan)], capture_output=True, text=True, env=env,
                          timeout=900)
    assert done.returncode == 0, done.stderr[-2000:]
    return [json.loads(line) for line in done.stdout.splitlines() if line.startswith("{")]


def test_a_crash_in_every_writing_verb_leaves_one_whole_generation(tmp_path):
    """Each writing verb killed at sampled steps (every step: ``make crash``): a
    half-written temporary file, the manifest's rename, and the step after it. The
    verdicts are ``crash_verbs.run_case``'s: check passes on the old generation or the new
    one, never a mix; recover records what it found; the record verifies; the next write
    succeeds and leaves nothing unnamed behind."""
    results = _verbs_driver(tmp_path / "base", tmp_path / "out",
                            {"verbs": VERBS, "steps": "sample"})
    assert {c["verb"] for c in results} == set(VERBS)
    for case in results:
        assert case["problems"] == [], case
    by_verb = {v: [c for c in results if c["verb"] == v] for v in VERBS}
    for verb, cases in by_verb.items():
        assert len(cases) >= 3, (verb, cases)
        # Killed at the manifest's rename the verb did not commit; a step later, it had.
        assert any(not c["committed"] for c in cases) and any(c["committed"] for c in cases), \
            (verb, [(c["step"], c["committed"]) for c in cases])
    recreated = [c for c in by_verb["new"] + by_verb["adopt"] if "created_again" in c]
    assert recreated, "no crashed new/adopt left a folder to create again"
    print(f"crash verbs (sample): {len(results)} tried, {len(results)} held")


# ------------------------------------------------------------------ strace, real commands
STRACE = strace_path()


def _cli(*args, strace: list[str] | None = None, cwd=None) -> subprocess.CompletedProcess:
    env = child_env(PYTHONDONTWRITEBYTECODE="1")
    command = [sys.executable, "-m", "colonnade", *args]
    return subprocess.run([*(strace or []), *command], capture_output=True, text=True,
                          env=env, timeout=300, cwd=cwd)


def _committing_thread_calls(trace_file: Path, names: tuple[str, ...],
                             ) -> list[tuple[str, int, str]]:
    """(syscall, its invocation number in the thread that renamed the manifest, the line)
    from an strace log: strace numbers invocations per tracee (thread), so that is the
    numbering ``inject=...:when=N`` uses."""
    lines = trace_file.read_text().splitlines()
    committer = next((line.split(None, 1)[0] for line in lines
                      if " rename" in line and 'manifest.yaml"' in line), None)
    assert committer is not None, "no rename of manifest.yaml in the trace:\n" + "\n".join(
        lines[-30:])
    seen: dict[str, int] = {}
    calls = []
    for line in lines:
        pid, _, rest = line.partition(" ")
        rest = rest.strip()
        name = rest.split("(", 1)[0].strip()
        if pid != committer or name not in names or rest.startswith("<..."):
            continue
        seen[name] = seen.get(name, 0) + 1
        calls.append((name, seen[name], rest))
    return calls


@pytest.mark.skipif(STRACE is None, reason="strace is missing or may not trace here (make setup installs it)")
def test_the_real_seal_command_killed_by_strace_at_its_commit(crash_base, tmp_path):
    base, _ = crash_base
    from colonnade.app.evidence import check_workspace
    from colonnade.app.record import history
    from colonnade.app.transaction import recover
    from colonnade.app.workspace import grow_workspace

    info = json.loads((base / "base.json").read_text())
    files = info["files"]
    # The grow of task "new" committed, uninterrupted, on a copy; the seal is the victim.
    ready = tmp_path / "ready"
    shutil.copytree(info["ws"], ready)
    grow_workspace(ready, "new", files["new"][0], progress=False)
    names = ("rename", "renameat", "renameat2", "fsync", "unlink", "unlinkat")
    dry = tmp_path / "dry"
    shutil.copytree(ready, dry)
    log = tmp_path / "seal.strace"
    done = _cli("seal", str(dry), "--task", "new", "--probe", files["new"][1],
                strace=[STRACE, "-f", "-qq", "-o", str(log), "-e", f"trace=execve,{','.join(names)}"])
    assert done.returncode == 0, done.stderr
    calls = _committing_thread_calls(log, names)
    manifest_rename = next(c for c in calls if c[0].startswith("rename")
                           and 'manifest.yaml"' in c[2])
    after = calls[calls.index(manifest_rename) + 1]  # the folder's fsync: committed
    cleanup = next(c for c in calls if c[0].startswith("unlink"))
    victims = [(manifest_rename, False), (after, True), (cleanup, True)]
    for (name, number, line), committed in victims:
        ws = tmp_path / f"kill-{name}-{number}"
        shutil.copytree(ready, ws)
        killed = _cli("seal", str(ws), "--task", "new", "--probe", files["new"][1],
                      strace=[STRACE, "-f", "-qq", "-o", os.devnull,
                              "-e", f"inject={name}:signal=KILL:when={number}"])
        assert killed.returncode != 0, (line, killed.stderr)
        report = check_workspace(ws)
        assert report.passed, (line, report.record.first, report.tasks)
        sealed = {t.task for t in report.tasks if t.verdict == "exact"}
        assert ("new" in sealed) == committed and "old" in sealed, (line, sealed)
        # The next writer finishes or undoes what the killed one left, and records it.
        assert recover(ws) is not None, line
        assert history(ws)[-1].step == "recovered"
        assert check_workspace(ws).passed


# ------------------------------------------------------- what an interrupted new may clear
def test_new_clears_only_what_an_interrupted_creation_left(crash_base, tmp_path):
    """``new`` (and ``adopt``) empties a folder only when it holds exactly what a creation
    killed before its commit point leaves; a workspace that lost its manifest is not that,
    and nothing of it is touched."""
    from colonnade.app.workspace import new_workspace
    from colonnade.errors import WorkspaceError

    base, _ = crash_base
    info = json.loads((base / "base.json").read_text())
    spec = base / "spec.yaml"
    lost = tmp_path / "lost"
    shutil.copytree(info["ws"], lost)
    (lost / "manifest.yaml").unlink()
    (lost / ".pending").write_text(json.dumps({"verb": "seal", "from_head": "ab" * 32}))
    kept = {p.name: p.read_bytes() for p in (lost / "data").iterdir()}
    for note in (None, {"verb": "seal", "from_head": "ab" * 32}):
        if note is None:
            (lost / ".pending").unlink()
        with pytest.raises(WorkspaceError, match="exists and is not an empty folder"):
            new_workspace(spec, lost)
        assert {p.name: p.read_bytes() for p in (lost / "data").iterdir()} == kept
    # A creation's leftovers with one thing more (a folder in data/) are not touched either.
    made = tmp_path / "made"
    (made / "data" / "sub").mkdir(parents=True)
    (made / ".pending").write_text(json.dumps({"verb": "new", "from_head": None}))
    with pytest.raises(WorkspaceError, match="exists and is not an empty folder"):
        new_workspace(spec, made)
    assert (made / "data" / "sub").is_dir() and (made / ".pending").exists()
    (made / "data" / "sub").rmdir()
    (made / "data" / "weights.part").write_bytes(b"\0" * 10)
    new_workspace(spec, made)  # now exactly a creation's leftovers: cleared, then created
    assert not (made / "data" / "weights.part").exists()
    assert not (made / ".pending").exists()


# ----------------------------------------------------------------------------- key new
def _key_new_killed_at(step: int | None, name: Path) -> int:
    """``new_key`` in a forked child that dies by ``os._exit`` at file-system step
    ``step`` (crash_driver's steps); its exit code (77: killed there)."""
    from crash_driver import _counting

    from colonnade.app.record import new_key

    pid = os.fork()
    if pid == 0:
        counter: list[int] = [0]
        real, wrapped = _counting(step, counter, [])
        for call, fn in wrapped.items():
            setattr(os, call, fn)
        try:
            new_key(name)
            code = 0 if step is None or counter[0] < step else 78
        except BaseException:  # noqa: BLE001 -- any failure is the parent's finding
            code = 1
        for call, fn in real.items():
            setattr(os, call, fn)
        os._exit(code if step is not None else min(counter[0], 70))
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status)


def test_key_new_killed_at_any_step_leaves_no_half_key(tmp_path):
    """A killed ``key new`` leaves both files whole and matching, the public key alone,
    or nothing; never a partial or empty private key that a retry would then refuse to
    replace. Checked with the cryptography package's own PEM loaders."""
    from cryptography.hazmat.primitives import serialization

    from colonnade.app.record import new_key

    (tmp_path / "count").mkdir()
    steps = _key_new_killed_at(None, tmp_path / "count" / "signer")  # its step count
    assert steps >= 8, steps  # two temporary files written, fsynced, linked, removed
    for step in range(1, steps + 1):
        folder = tmp_path / f"at-{step}"
        folder.mkdir()
        assert _key_new_killed_at(step, folder / "signer") == 77, step
        names = {p.name for p in folder.iterdir() if not p.name.endswith(".tmp")}
        assert names in (set(), {"signer.pub"}, {"signer.pub", "signer.key"}), (step, names)
        if "signer.key" in names:
            private = serialization.load_pem_private_key(
                (folder / "signer.key").read_bytes(), None)
            public = serialization.load_pem_public_key((folder / "signer.pub").read_bytes())
            assert private.public_key().public_bytes(
                serialization.Encoding.Raw, serialization.PublicFormat.Raw) == \
                public.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
            assert (folder / "signer.key").stat().st_mode & 0o077 == 0
        elif "signer.pub" in names:
            serialization.load_pem_public_key((folder / "signer.pub").read_bytes())
        if not names:  # nothing in place: the retry works, and clears the killed one's files
            new_key(folder / "signer")
            assert {p.name for p in folder.iterdir()} == {"signer.key", "signer.pub"}
