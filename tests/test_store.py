"""Workspace files: atomic writes, crash recovery, and loading that never runs code."""

from __future__ import annotations

import os

import pytest
import torch
import yaml
from conftest import snapshot

from colonnade.errors import WorkspaceError
from colonnade.files import store
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

SPEC = {"input": [8], "column": [{"dense": 6}, {"norm": "batch"}, {"act": "relu"},
                                 {"dense": 4}, {"act": "relu"}],
        "lateral": {"kind": "nonlinear", "reduce": 0.5}}


def _ws(tmp_path, tasks=2):
    net = store.create(SPEC, tmp_path / "ws")
    for k in range(tasks):
        net.add_column(f"t{k}", 3, seed=k)
        net.freeze()
    store.save(net, tmp_path / "ws")
    return net, tmp_path / "ws"


def test_manifest_lists_files_with_digests(tmp_path):
    import hashlib

    _, ws = _ws(tmp_path)
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    # SHA-256 as defined by FIPS 180-4, computed by Python's hashlib.
    stored = store.listed_files(ws)["weights.safetensors"]
    digest = hashlib.sha256(stored.read_bytes()).hexdigest()
    assert manifest["files"]["weights.safetensors"]["sha256"] == digest
    # The content address: data/<stem>.<sha256>.<ext>, so a name never holds two contents.
    assert stored == ws / "data" / f"weights.{digest}.safetensors"
    assert [t["name"] for t in manifest["network"]["tasks"]] == ["t0", "t1"]
    assert manifest["history"][0]["step"] == "created"
    # Older generations are collected once the new one is durable; no note is left behind.
    assert sorted(p for p in os.listdir(ws) if not p.startswith(".")) == ["data",
                                                                          "manifest.yaml"]
    assert os.listdir(ws / "data") == [stored.name]
    assert not (ws / ".pending").exists()


def test_a_failure_at_the_manifest_rename_keeps_the_old_workspace(tmp_path, monkeypatch):
    net, ws = _ws(tmp_path)
    before = snapshot(ws)
    x = torch.randn(4, 8)
    ref = store.load(ws)(x, task="t1")
    net.add_column("t2", 3, seed=7)
    net.freeze()
    real_replace = os.replace

    def fail(src, dst):
        if str(dst).endswith("manifest.yaml"):
            raise OSError("simulated failure")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(OSError):
        store.save(net, ws)
    monkeypatch.setattr(os, "replace", real_replace)
    # The new data files were written under new names and removed again; the old
    # manifest and every file it names were never touched.
    assert snapshot(ws) == before
    back = store.load(ws)
    assert back.tasks == ["t0", "t1"]
    assert torch.equal(back(x, task="t1"), ref)


def test_a_network_loaded_before_another_commit_is_refused(tmp_path):
    """A writer never commits on top of a generation it did not read."""
    _, ws = _ws(tmp_path)
    first, second = store.load(ws), store.load(ws)
    first.add_column("a", 3, seed=1)
    store.save(first, ws)
    second.add_column("b", 3, seed=2)
    before = snapshot(ws)
    with pytest.raises(WorkspaceError, match="changed since this network was loaded"):
        store.save(second, ws)
    assert snapshot(ws) == before
    assert store.load(ws).tasks == ["t0", "t1", "a"]


def test_an_older_one_folder_workspace_is_read_and_moved_on_the_next_commit(tmp_path):
    """Workspaces written before content addresses kept files at the top level."""
    _, ws = _ws(tmp_path)
    for name, path in store.listed_files(ws).items():
        os.replace(path, ws / name)
    (ws / "data").rmdir()
    net = store.load(ws)  # read from the older places, digests checked as ever
    assert net.tasks == ["t0", "t1"]
    net.add_column("t2", 3, seed=3)
    store.save(net, ws)
    assert not (ws / "weights.safetensors").exists()
    assert store.listed_files(ws)["weights.safetensors"].parent == ws / "data"
    assert store.load(ws).tasks == ["t0", "t1", "t2"]


def test_changed_weights_are_refused_when_strict(tmp_path):
    _, ws = _ws(tmp_path)
    path = store.listed_files(ws)["weights.safetensors"]
    data = bytearray(path.read_bytes())
    data[-1] ^= 1
    path.write_bytes(bytes(data))
    with pytest.raises(WorkspaceError, match="does not match the manifest"):
        store.load(ws)
    net = store.load(ws, strict=False)
    assert net.meta["_mismatched"] == ["weights.safetensors"]


def test_manifest_with_python_tags_never_executes(tmp_path):
    _, ws = _ws(tmp_path)
    marker = tmp_path / "pwned"
    text = (ws / "manifest.yaml").read_text()
    text = text.replace("format: colonnade-workspace",
                        f"format: !!python/object/apply:os.system ['touch {marker}']")
    (ws / "manifest.yaml").write_text(text)
    with pytest.raises(WorkspaceError, match="cannot be read as YAML"):
        store.load(ws)
    assert not marker.exists()


@pytest.mark.parametrize("damage,message", [
    (lambda ws: store.listed_files(ws)["weights.safetensors"].unlink(), "missing"),
    (lambda ws: (ws / "manifest.yaml").write_text("format: other\n"), "not a colonnade manifest"),
    (lambda ws: (ws / "manifest.yaml").unlink(), "not a workspace"),
])
def test_damaged_workspaces_get_one_sentence(tmp_path, damage, message):
    _, ws = _ws(tmp_path)
    damage(ws)
    with pytest.raises(WorkspaceError, match=message):
        store.load(ws)


def test_weights_that_do_not_fit_the_network(tmp_path):
    from safetensors.torch import save as st_save

    _, ws = _ws(tmp_path)
    data = st_save({"columns.0.blocks.0.weighted.weight": torch.zeros(6, 8)})
    import hashlib

    digest = hashlib.sha256(data).hexdigest()
    (ws / "data" / f"weights.{digest}.safetensors").write_bytes(data)
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    manifest["files"]["weights.safetensors"].update(sha256=digest, bytes=len(data))
    (ws / "manifest.yaml").write_text(yaml.safe_dump(manifest))
    with pytest.raises(WorkspaceError, match="the record does not verify"):
        store.load(ws)  # the record binds the file digests
    with pytest.raises(WorkspaceError, match="does not fit the manifest's network"):
        store.load(ws, strict=False)


def test_attachments_round_trip(tmp_path):
    net, ws = _ws(tmp_path)
    net.attachments["extra.safetensors"] = {"r": torch.arange(5.0)}
    store.save(net, ws)
    back = store.load(ws)
    assert torch.equal(back.attachments["extra.safetensors"]["r"], torch.arange(5.0))


def test_architecture_is_rebuilt_from_the_manifest(tmp_path):
    net, ws = _ws(tmp_path, tasks=3)
    back = store.load(ws)
    assert back.architecture() == net.architecture()
    assert isinstance(back, ProgressiveNet) and not back.training
    assert not any(p.requires_grad for p in back.parameters())
    assert parse_spec(SPEC) == back.spec


@pytest.mark.parametrize("at_call", [1, 6])  # the first fsync of the commit; one after the switch
def test_ctrl_c_during_a_commit_finishes_it_and_says_so(tmp_path, monkeypatch, at_call):
    """SIGINT is held while the commit runs: the commit completes, and the interrupt comes
    back as InterruptedAfterCommit, so the user is told the change was committed."""
    import signal

    from colonnade.errors import InterruptedAfterCommit

    net, ws = _ws(tmp_path)
    net.add_column("t2", 3, seed=7)
    net.freeze()
    real_fsync, calls = os.fsync, [0]

    def fsync_then_interrupt(fd):
        calls[0] += 1
        if calls[0] == at_call:
            os.kill(os.getpid(), signal.SIGINT)  # a real signal, as Ctrl-C sends it
        return real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fsync_then_interrupt)
    with pytest.raises(InterruptedAfterCommit):
        store.save(net, ws)
    monkeypatch.setattr(os, "fsync", real_fsync)
    assert calls[0] > at_call  # the commit went on after the signal
    assert store.load(ws).tasks == ["t0", "t1", "t2"]
    assert not (ws / ".pending").exists()
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


@pytest.mark.parametrize("name", ["../../outside.safetensors", "/etc/passwd",
                                  "data/../../x.safetensors", ".writer.lock"])
def test_a_listed_name_that_leaves_the_workspace_is_refused(tmp_path, name):
    """Invariant 12: paths named by a workspace resolve inside it (hand-edited manifest)."""
    _, ws = _ws(tmp_path)
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    manifest["files"][name] = dict(manifest["files"]["weights.safetensors"])
    (ws / "manifest.yaml").write_text(yaml.safe_dump(manifest, sort_keys=False))
    with pytest.raises(WorkspaceError, match="record does not verify"):
        store.load(ws)  # the record binds the files section first
    with pytest.raises(WorkspaceError, match="not a plain name inside the workspace"):
        store.load(ws, strict=False)  # as check reads it: still never outside


def test_links_planted_in_a_workspace_are_never_written_through(tmp_path):
    """A workspace from someone else may hold symbolic links where colonnade keeps its own
    files; writing through one would change a file outside the workspace."""
    net, ws = _ws(tmp_path)
    victim = tmp_path / "victim.txt"
    victim.write_text("the user's own file\n")
    (ws / ".writer.lock").unlink()
    (ws / ".writer.lock").symlink_to(victim)
    with pytest.raises(WorkspaceError, match="symbolic link"):
        store.save(net, ws)
    assert victim.read_text() == "the user's own file\n"
    (ws / ".writer.lock").unlink()
    elsewhere = tmp_path / "elsewhere"
    os.replace(ws / "data", elsewhere)
    (ws / "data").symlink_to(elsewhere)
    before = snapshot(elsewhere)
    net.add_column("t2", 3, seed=5)
    with pytest.raises(WorkspaceError, match="not a folder of its own"):
        store.save(net, ws)
    assert snapshot(elsewhere) == before
