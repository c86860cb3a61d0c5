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
    digest = hashlib.sha256((ws / "weights.safetensors").read_bytes()).hexdigest()
    assert manifest["files"]["weights.safetensors"]["sha256"] == digest
    assert [t["name"] for t in manifest["network"]["tasks"]] == ["t0", "t1"]
    assert manifest["history"][0]["step"] == "created"
    assert sorted(os.listdir(ws)) == ["manifest.yaml", "weights.safetensors"]


def test_a_crash_before_the_manifest_rename_keeps_the_old_workspace(tmp_path, monkeypatch):
    net, ws = _ws(tmp_path)
    before = snapshot(ws)
    x = torch.randn(4, 8)
    ref = store.load(ws)(x, task="t1")
    net.add_column("t2", 3, seed=7)
    net.freeze()
    real_replace = os.replace

    def crash(src, dst):
        if str(dst).endswith("manifest.yaml"):
            raise OSError("simulated power cut")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError):
        store.save(net, ws)
    monkeypatch.setattr(os, "replace", real_replace)
    # The new weights were already renamed into place; the old ones survive as .prev and
    # the old manifest still names them, so loading finds the old workspace whole.
    back = store.load(ws)
    assert back.tasks == ["t0", "t1"]
    assert torch.equal(back(x, task="t1"), ref)
    store.save(back, ws)  # the next save tidies up
    assert snapshot(ws).keys() == before.keys()


def test_a_crash_while_writing_temporaries_changes_nothing(tmp_path, monkeypatch):
    net, ws = _ws(tmp_path)
    before = snapshot(ws)

    def boom(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(os, "fsync", boom)
    with pytest.raises(OSError):
        store.save(net, ws)
    assert snapshot(ws) == before


def test_changed_weights_are_refused_when_strict(tmp_path):
    _, ws = _ws(tmp_path)
    data = bytearray((ws / "weights.safetensors").read_bytes())
    data[-1] ^= 1
    (ws / "weights.safetensors").write_bytes(bytes(data))
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
    (lambda ws: (ws / "weights.safetensors").unlink(), "missing"),
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
    (ws / "weights.safetensors").write_bytes(data)
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    import hashlib

    manifest["files"]["weights.safetensors"]["sha256"] = hashlib.sha256(data).hexdigest()
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
