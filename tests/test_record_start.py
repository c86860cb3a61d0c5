"""Starting the record of a workspace made before the record existed.

The old workspace is made the way an older colonnade wrote one: history entries without
chain fields, no ``record`` section in the manifest, a seal that names its probe by path
and keeps no copy. Outside references: the ``cryptography`` package's own Ed25519
verification for the signature, hashlib for file digests, scikit-learn's digits as data.
"""

from __future__ import annotations

import base64

import pytest
import yaml
from conftest import DIGITS_SPEC, permuted_digit_tasks, snapshot, write_npz
from cryptography.hazmat.primitives import serialization

from colonnade.app.evidence import check_workspace, seal_workspace
from colonnade.app.export import export_task
from colonnade.app.record import history, new_key, start_record, verify_record
from colonnade.app.workspace import grow_workspace, new_workspace
from colonnade.cli import main
from colonnade.errors import UsageError, WorkspaceError
from colonnade.evidence import seal
from colonnade.files import store
from colonnade.model import guard

CHAIN_FIELDS = ("seq", "prev_sha256", "verb", "by", "state_sha256", "entry_sha256",
                "prev_signature_sha256", "signature")


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("old")
    spec = dict(DIGITS_SPEC, train=dict(DIGITS_SPEC["train"], epochs=2))
    (root / "spec.yaml").write_text(yaml.safe_dump(spec))
    paths = {}
    for t in permuted_digit_tasks(2):
        paths[t["name"]] = (write_npz(root / f"{t['name']}.npz", t),
                            write_npz(root / f"{t['name']}_probe.npz",
                                      {"x": t["x_test"], "y": t["y_test"]}))
    ws = root / "ws"
    new_workspace(root / "spec.yaml", ws)
    for name, (train, _) in paths.items():
        grow_workspace(ws, name, train, progress=False)
    seal_workspace(ws, "perm0", paths["perm0"][1])
    _make_old(ws)
    return {"root": root, "ws": ws, "paths": paths, "key": new_key(root / "migrator")}


def _make_old(ws) -> None:
    """Rewrite ``ws`` as an older colonnade wrote it (see the module docstring)."""
    net = store.load(ws)
    entry = guard.latest_seal(net, "perm0")
    net.kept_files.pop(entry["probe"]["file"])
    entry["probe"] = {"path": "../perm0_probe.npz", "sha256": entry["probe"]["sha256"],
                      "samples": entry["probe"]["samples"]}
    entry["entry_sha256"] = seal.entry_digest(entry)  # seals carried their own digest
    steps = len(net.meta["history"])
    store.save(net, ws)
    manifest = yaml.safe_load((ws / store.MANIFEST).read_text())
    manifest.pop("record")
    del manifest["history"][steps:]  # the entry this rewrite's own commit added
    for item in manifest["history"]:
        for key in CHAIN_FIELDS:
            item.pop(key, None)
        if item.get("reason") is None:
            item.pop("reason", None)
    (ws / store.MANIFEST).write_text(yaml.safe_dump(manifest, sort_keys=False))


def _copy(made, tmp_path):
    import shutil

    shutil.copytree(made["ws"], tmp_path / "ws")
    return tmp_path / "ws"


def test_an_old_workspace_is_refused_with_the_way_forward(made, tmp_path, capsys):
    ws = _copy(made, tmp_path)
    with pytest.raises(WorkspaceError, match="made before colonnade chained its record.*"
                                             "colonnade record start WS --reason TEXT"):
        store.load(ws)
    assert main(["check", str(ws)]) == 1
    assert "record start" in capsys.readouterr().out


def test_record_start_chains_the_history_as_found_and_says_so(made, tmp_path):
    ws = _copy(made, tmp_path)
    found = yaml.safe_load((ws / store.MANIFEST).read_text())["history"]
    entry = start_record(ws, reason="taken over from the pilot project", by="Mia Grator",
                         sign=made["key"]["key"])
    assert entry["step"] == "record_started" and entry["unchained_entries"] == len(found)
    entries = history(ws)  # verifies the chain, or raises
    assert len(entries) == len(found) + 1
    for old, now in zip(found, entries, strict=False):
        # the earlier entries keep their content; no author or verb is made up for them
        assert {k: v for k, v in now.details.items()} == {
            k: v for k, v in old.items() if k not in ("step", "time", "task", "reason")}
        assert (now.step, now.time, now.by, now.verb, now.signed) == (
            old["step"], old["time"], None, None, False)
    last = entries[-1]
    assert (last.by, last.reason, last.verb) == ("Mia Grator",
                                                 "taken over from the pilot project",
                                                 "record start")
    assert "were written before colonnade chained its record" in last.details["note"]
    report = verify_record(ws, trust=[made["key"]["public"]])
    assert report.passed, report.findings
    # The reference for the signature: cryptography's own Ed25519 verification.
    public = serialization.load_pem_public_key(open(made["key"]["public"], "rb").read())
    public.verify(base64.b64decode(last.signature["value"]),
                  b"colonnade record signature\n" + last.sha256.encode())


def test_after_the_start_the_workspace_works_and_the_old_seal_asks_for_its_probe(made,
                                                                              tmp_path):
    ws = _copy(made, tmp_path)
    start_record(ws, reason="migrated")
    report = check_workspace(ws)
    assert report.record.passed
    (task,) = report.tasks
    assert task.task == "perm0" and task.verdict == "unverified"
    assert "keeps no copy of its probe" in task.failures[0]
    given = check_workspace(ws, task="perm0", probe=made["paths"]["perm0"][1])
    assert [t.verdict for t in given.tasks] == ["exact"] and given.passed
    # export measures an old seal's task on its validation data, as for an unsealed one
    exported = export_task(ws, "perm0", tmp_path / "perm0.pt")
    assert exported["report"]["perm0"]["probe"]["source"] == "validation"
    seal_workspace(ws, "perm1", made["paths"]["perm1"][1])  # any verb works again
    assert {t.task: t.verdict for t in check_workspace(ws).tasks} == {
        "perm0": "unverified", "perm1": "exact"}


def test_record_start_refusals_change_nothing(made, tmp_path, capsys):
    ws = _copy(made, tmp_path)
    before = snapshot(ws)
    with pytest.raises(UsageError, match="needs --reason"):
        start_record(ws, reason="  ")
    # the weights file, found by its name's stem whatever folder layout the store uses
    (weights,) = [p for p in ws.rglob("weights*.safetensors") if p.is_file()]
    original = weights.read_bytes()
    weights.write_bytes(original[:-1] + bytes([original[-1] ^ 1]))
    changed = snapshot(ws)
    with pytest.raises(WorkspaceError, match="weights.safetensors does not match"):
        start_record(ws, reason="migrated")
    assert snapshot(ws) == changed
    weights.write_bytes(original)
    assert snapshot(ws) == before
    assert main(["record", "start", str(ws), "--reason", "migrated", "--by", "Mia"]) == 0
    assert "chained as found" in capsys.readouterr().out
    started = snapshot(ws)
    assert main(["record", "start", str(ws), "--reason", "again"]) == 2
    err = capsys.readouterr().err
    assert "has a chained record already" in err and "Traceback" not in err
    assert snapshot(ws) == started
    assert history(ws)[-1].by == "Mia"


def test_record_start_waits_for_another_writer(made, tmp_path, capsys):
    """It takes the workspace's writer lock like any writing verb: while another process
    holds it (a real flock(2) in a child process), it stops with exit 3 and writes nothing."""
    import subprocess
    import sys

    ws = _copy(made, tmp_path)
    # The holder holds until its stdin closes (the test kills it anyway), not for a time.
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys\n"
         "from colonnade.files.lock import writer_lock\n"
         "with writer_lock(sys.argv[1], 'grow'):\n"
         "    print('held', flush=True); sys.stdin.read()\n", str(ws)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        before = yaml.safe_load((ws / store.MANIFEST).read_text())
        assert main(["record", "start", str(ws), "--reason", "migrated", "--wait", "0"]) == 3
        assert "grow" in capsys.readouterr().err
        assert yaml.safe_load((ws / store.MANIFEST).read_text()) == before
    finally:
        holder.kill()
        holder.wait()
    assert main(["record", "start", str(ws), "--reason", "migrated"]) == 0
