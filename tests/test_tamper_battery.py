"""Tamper battery: an outsider's edits to every file and every manifest value of a workspace.

One small workspace is built per module: an ONNX model adopted as column 0 and sealed
(the camera inspection station), a column grown and sealed on it (pump vibration),
exported as an ONNX artifact (recorded in the history, with its reference outputs), and a
head grown last. Every step but the export (which takes no key) is signed by 'alice'. Each
case edits a copy (``shutil.copytree``) and runs ``check`` through the command line, with
and without ``--trust alice.pub``; ``show`` and ``report`` are run on a few.

Expected for every edit: ``check`` exits non-zero, its first finding is one sentence
naming what moved (the file, the manifest section, or the history entry), and nothing is
a traceback. Exemptions are stated beside the case that makes them.

References outside colonnade: ``hashlib`` for the SHA-256 of every listed file, PyYAML's
own safe loader and dumper for reading and rewriting the manifest, and the
``cryptography`` package's Ed25519 (a second key made with it signs forged entries).
"""

from __future__ import annotations

import base64
import copy
import hashlib
import io
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
import yaml
from adopt_helpers import small_cnn
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

import colonnade
from colonnade.app.adopt import adopt_workspace
from colonnade.app.evidence import check_workspace, seal_workspace
from colonnade.app.export import export_artifact
from colonnade.app.record import new_key, verify_record
from colonnade.app.workspace import grow_workspace
from colonnade.cli import main
from colonnade.errors import UsageError, WorkspaceError
from colonnade.evidence import record
from colonnade.evidence.integrity import verify_manifest
from colonnade.evidence.seal import entry_digest as seal_entry_digest
from colonnade.evidence.seal import load_probe, seal_task
from colonnade.evidence.signing import Signer, check_signature, load_trusted, signature_report
from colonnade.evidence.verify import check_net, check_seal, probe_for
from colonnade.files.manifest import manifest_text
from colonnade.model.guard import latest_seal

SHAPE = (3, 16, 16)
ONNX_TAPS = ["/2/Conv_output_0", "/4/GlobalAveragePool_output_0"]


# ----------------------------------------------------------------------------- the workspace
@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("tamper")
    alice = new_key(root / "alice")
    mallory = new_key(root / "mallory")
    spec = root / "spec.yaml"
    spec.write_text(yaml.safe_dump({
        "input": list(SHAPE),
        "column": [{"conv2d": 4, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 8}],
        "lateral": {"kind": "linear"}, "train": {"epochs": 1}}))
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(small_cnn(), (torch.zeros(2, *SHAPE),), buf, dynamo=False,
                          input_names=["x"], output_names=["y"],
                          dynamic_axes={"x": {0: "n"}, "y": {0: "n"}})
    (root / "station.onnx").write_bytes(buf.getvalue())
    rng = np.random.default_rng(0)
    np.savez(root / "station_probe.npz", x=rng.random((6, *SHAPE), dtype=np.float32),
             y=np.arange(6) % 4)
    np.savez(root / "pump_train.npz", x=rng.random((40, *SHAPE), dtype=np.float32),
             y=np.arange(40) % 3)
    np.savez(root / "pump_probe.npz", x=rng.random((9, *SHAPE), dtype=np.float32),
             y=np.arange(9) % 3)
    ws = root / "ws"
    key = alice["key"]
    adopt_workspace(str(root / "station.onnx"), ws, "station", ONNX_TAPS, str(spec),
                    str(root / "station_probe.npz"), seal=True, sign=key, by="Alice")
    grow_workspace(ws, "pump", str(root / "pump_train.npz"), epochs=1, progress=False,
                   sign=key, by="Alice")
    seal_workspace(ws, "pump", str(root / "pump_probe.npz"), sign=key, by="Alice",
                   accept_low_accuracy=True)  # random data: the accuracy is chance
    export_artifact(ws, root / "pump.onnx", task="pump")
    grow_workspace(ws, "valve", str(root / "pump_train.npz"), mode="head", on="pump",
                   epochs=1, progress=False, sign=key, by="Alice")
    report = check_workspace(ws, trust=[alice["public"]])
    assert report.passed, report.record.findings
    assert [t.verdict for t in report.tasks] == ["exact", "exact"]
    text = (ws / "manifest.yaml").read_bytes()
    manifest = yaml.safe_load(text)
    files = {name: ws / "data" / f"{Path(name).stem.split('.')[0]}.{entry['sha256']}"
             f"{''.join(Path(name).suffixes)}" if entry["sha256"] not in name
             else ws / "data" / name for name, entry in manifest["files"].items()}
    for name, path in files.items():  # hashlib is the reference for every listed digest
        assert hashlib.sha256(path.read_bytes()).hexdigest() == \
            manifest["files"][name]["sha256"], name
    return {"root": root, "ws": ws, "alice": alice, "mallory": mallory, "text": text,
            "manifest": manifest, "files": files}


def _copy(built, tmp_path) -> Path:
    target = tmp_path / "ws"
    shutil.copytree(built["ws"], target, symlinks=True)
    return target


def _check(ws, capsys, *flags) -> tuple[int, str]:
    code = main(["check", str(ws), *map(str, flags)])
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return code, out + err


def _first_line(text: str) -> str:
    """The first line that says what is wrong (not the record's summary or a note)."""
    return next((line for line in text.splitlines()
                 if not line.startswith(("record: does not verify (", "record: note"))), text)


def _fails_naming(built, ws, capsys, *words, cli: bool = True) -> None:
    """``check`` fails, its first failing line naming one of ``words`` (what moved):
    through the command line without --trust (the seals are checked too), and the record
    alone with --trust alice.pub (trust changes nothing but the record's verdict)."""
    if cli:
        code, text = _check(ws, capsys)
        assert code != 0, text
        assert any(w in _first_line(text) for w in words), (words, text)
    try:
        first = verify_record(ws, trust=[built["alice"]["public"]]).first
    except WorkspaceError as exc:  # no manifest at all: the command line says it as well
        first = str(exc)
    assert first is not None and any(w in first for w in words), (words, first)


def _listed(ws: Path, built, name: str) -> Path:
    return ws / built["files"][name].relative_to(built["ws"])


# ----------------------------------------------------------------------------- every file
FILE_EDITS = ["flip first byte", "flip middle byte", "flip last byte", "truncate",
              "append a byte", "empty", "delete", "symlink to a copy"]
CLI_EDITS = ("flip middle byte", "truncate", "delete", "symlink to a copy")


def _edit_file(path: Path, how: str, spare: Path) -> None:
    data = path.read_bytes()
    if how.startswith("flip"):
        at = {"first": 0, "middle": len(data) // 2, "last": len(data) - 1}[how.split()[1]]
        changed = bytearray(data)
        changed[at] ^= 0xFF
        path.write_bytes(bytes(changed))
    elif how == "truncate":
        path.write_bytes(data[: len(data) // 2])
    elif how == "append a byte":
        path.write_bytes(data + b"\n")
    elif how == "empty":
        path.write_bytes(b"")
    elif how == "delete":
        path.unlink()
    elif how == "symlink to a copy":
        spare.write_bytes(data)
        path.unlink()
        path.symlink_to(spare)


def _names(built) -> list[str]:
    return ["manifest.yaml", *built["manifest"]["files"]]


@pytest.mark.parametrize("how", FILE_EDITS)
def test_every_file_of_the_workspace_edited_is_caught_and_named(built, tmp_path, capsys, how):
    names = _names(built)
    # weights, validation, seals, artifacts, adopted model bytes, two kept probes
    assert len(names) == 8, names
    for name in names:
        ws = _copy(built, tmp_path)
        path = ws / name if name == "manifest.yaml" else _listed(ws, built, name)
        _edit_file(path, how, tmp_path / "spare")
        words = ["manifest", "workspace"] if name == "manifest.yaml" else [name]
        # The whole command line for the manifest and for one edit of each kind (the seals
        # are then read from the edited file too); the record alone for the rest.
        _fails_naming(built, ws, capsys, *words, cli=name == "manifest.yaml" or how in CLI_EDITS)
        shutil.rmtree(ws)


# ----------------------------------------------------------------------------- every value
def _leaves(value, path=()):
    """Every scalar (and empty container) of parsed YAML with its path of keys/indices."""
    if isinstance(value, dict) and value:
        for key, inner in value.items():
            yield from _leaves(inner, (*path, key))
    elif isinstance(value, list) and value:
        for index, inner in enumerate(value):
            yield from _leaves(inner, (*path, index))
    else:
        yield path, value


def _keys(value, path=()):
    """The path of every mapping key, at every depth."""
    if isinstance(value, dict):
        for key, inner in value.items():
            yield (*path, key)
            yield from _keys(inner, (*path, key))
    elif isinstance(value, list):
        for index, inner in enumerate(value):
            yield from _keys(inner, (*path, index))


def _other(value):
    """Another value of the same type (None has no other: a string stands in for it)."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + 1
    if isinstance(value, float):
        return value + 0.5
    if isinstance(value, str):
        return value[:-1] + ("0" if value[-1:] != "0" else "1") if value else "x"
    if isinstance(value, list):
        return ["x"]
    if isinstance(value, dict):
        return {"x": 1}
    return "x"


def _where(path) -> str:
    """What a finding must name for an edit at ``path``."""
    if path[0] == "history":
        return f"history entry {path[1] + 1} " if len(path) > 1 else "history"
    if path[0] == "record" or len(path) == 1:
        return str(path[0])
    return f"{path[0]}/{path[1]}"


def _digests(built) -> dict[str, str]:
    return {name: hashlib.sha256(path.read_bytes()).hexdigest()
            for name, path in built["files"].items()}


def _verdict(manifest, digests, built):
    """The record's checks on a manifest as an outsider would write it (canonical bytes,
    so only the values can give the edit away), trusting alice's key: trust only adds
    findings, and every edit must be caught without it as well (each case below holds
    without trust: the first finding never depends on it)."""
    return verify_manifest(manifest, b"", "", digests.get,
                           [load_trusted(built["alice"]["public"])])


def _set(manifest, path, value) -> None:
    node = manifest
    for step in path[:-1]:
        node = node[step]
    node[path[-1]] = value


def test_every_value_of_the_manifest_changed_is_caught_and_named(built):
    edited, digests = copy.deepcopy(built["manifest"]), _digests(built)
    assert _verdict(edited, digests, built).passed
    leaves = list(_leaves(edited))
    assert len(leaves) > 500, len(leaves)
    for path, value in leaves:
        _set(edited, path, _other(value))
        report = _verdict(edited, digests, built)
        _set(edited, path, value)
        assert not report.passed, path
        assert _where(path) in report.first, (path, report.first)
        assert "trusted key" not in report.first, (path, report.first)
    assert edited == built["manifest"]


def test_every_key_of_the_manifest_deleted_is_caught_and_named(built):
    base, digests = built["manifest"], _digests(built)
    keys = list(_keys(base))
    assert len(keys) > 300, len(keys)
    for path in keys:
        edited = copy.copy(base)  # every mapping on the path copied, the rest shared
        node = edited
        for step in path[:-1]:
            node[step] = copy.copy(node[step])
            node = node[step]
        del node[path[-1]]
        report = _verdict(edited, digests, built)
        assert not report.passed, path
        where = _where(path) if path != ("history",) else "no history"
        assert where in report.first, (path, report.first)
        assert "trusted key" not in report.first, (path, report.first)


# ----------------------------------------------------------------------------- named edits
def _mallory(built) -> Signer:
    pem = Path(built["mallory"]["key"]).read_bytes()
    return Signer(serialization.load_pem_private_key(pem, password=None), "mallory")


def _rename(value, old: str, new: str):
    """``value`` with every key and string equal to ``old`` renamed to ``new``."""
    if isinstance(value, dict):
        return {(new if k == old else k): _rename(v, old, new) for k, v in value.items()}
    if isinstance(value, list):
        return [_rename(v, old, new) for v in value]
    return new if value == old else value


def _sign_with_mallory(built, m, index) -> None:
    entry = m["history"][index]
    entry["signature"] = _mallory(built).sign(entry["entry_sha256"])


def _task(m, name):
    return next(t for t in m["network"]["tasks"] if t["name"] == name)


# name -> (edit of the parsed manifest, what the first finding must name)
MANIFEST_EDITS = {
    "history reversed": (lambda b, m: m["history"].reverse(), "history entry 1 "),
    "history entry dropped": (lambda b, m: m["history"].pop(3), "history entry 4 "),
    "history entry duplicated": (lambda b, m: m["history"].insert(
        3, copy.deepcopy(m["history"][2])), "history entry 4 "),
    "two history entries swapped": (lambda b, m: m["history"].insert(
        1, m["history"].pop(4)), "history entry 2 "),
    "a signature value changed": (lambda b, m: m["history"][2]["signature"].__setitem__(
        "value", m["history"][3]["signature"]["value"]), "history entry 3 "),
    "a public key changed": (lambda b, m: m["history"][1]["signature"].update(
        public=base64.b64encode(Ed25519PrivateKey.generate().public_key().public_bytes(
            serialization.Encoding.Raw, serialization.PublicFormat.Raw)).decode()),
        "history entry 2 "),
    "an entry re-signed by another key": (lambda b, m: _sign_with_mallory(b, m, 2),
                                          "history entry 3 "),
    "the head re-signed by another key": (lambda b, m: _sign_with_mallory(b, m, -1),
                                          "history entry 7 "),
    "a signature removed": (lambda b, m: m["history"][4].pop("signature"),
                            "history entry 5 "),
    "the head's signature removed": (lambda b, m: m["history"][-1].pop("signature"),
                                     "history entry 7 "),
    "an unsigned entry signed afterwards": (lambda b, m: _sign_with_mallory(b, m, 5),
                                            "history entry 6 "),
    "a seal moved to another task": (lambda b, m: m["seals"].__setitem__(
        "valve", m["seals"].pop("pump")), "seals/pump"),
    "a task renamed everywhere": (lambda b, m: m.update(_rename(m, "valve", "gate")),
                                  "history entry 7 "),
    "a class list changed": (lambda b, m: _task(m, "pump").__setitem__(
        "classes", _task(m, "pump")["classes"] + 1), "network/tasks"),
    "a file digest pointed at another file": (lambda b, m: m["files"]["seals.safetensors"]
                                              .update(m["files"]["artifacts.safetensors"]),
                                              "files/seals.safetensors"),
}


@pytest.mark.parametrize("case", list(MANIFEST_EDITS))
def test_named_manifest_edits_are_caught_and_named(built, tmp_path, capsys, case):
    edit, named = MANIFEST_EDITS[case]
    ws = _copy(built, tmp_path)
    manifest = copy.deepcopy(built["manifest"])
    edit(built, manifest)
    # As a careful outsider writes it (colonnade's own canonical bytes, so that only the
    # values can give the edit away), then as PyYAML's plain dump (keys sorted: the same
    # values, see the key-order exemption below) and as a dump in another layout.
    for text in (manifest_text(manifest), yaml.safe_dump(manifest)):
        (ws / "manifest.yaml").write_text(text, encoding="utf-8")
        _fails_naming(built, ws, capsys, named, cli=text is not manifest_text)
    (ws / "manifest.yaml").write_text(yaml.safe_dump(manifest, indent=4), encoding="utf-8")
    _fails_naming(built, ws, capsys, "manifest.yaml line", cli=False)


def test_a_record_rewritten_and_re_signed_by_another_key_fails_only_under_trust(built,
                                                                                  tmp_path,
                                                                                  capsys):
    """Exemption, by design: an outsider who edits a value and re-chains and re-signs the
    whole record with a key of their own writes a record that is internally sound. Without
    --trust, ``check`` makes no claim about who signed (it says so in a note); with
    --trust alice.pub it fails, naming the first entry no trusted key vouches for."""
    ws = _copy(built, tmp_path)
    manifest = copy.deepcopy(built["manifest"])
    manifest["records"]["pump"]["val_accuracy"] = 0.99
    record.unchain(manifest["history"])
    manifest["history"][0].pop("reason", None)
    record.extend(manifest, record.Attribution(verb="forged", by="Alice",
                                               signer=_mallory(built)))
    (ws / "manifest.yaml").write_text(manifest_text(manifest), encoding="utf-8")
    code, text = _check(ws, capsys)
    assert code == 0 and "not against keys you trust" in text, text
    code, text = _check(ws, capsys, "--trust", built["alice"]["public"])
    assert code == 1 and "history entry 1 (created) and the 6 after it are not signed by a " \
                         "trusted key" in text, text
    assert built["mallory"]["key_id"] in text


def test_reordered_keys_are_the_same_manifest_and_other_layouts_are_caught(built, tmp_path,
                                                                           capsys):
    """Exemption: YAML mapping keys are unordered (YAML 1.2, section 3.2.1.1: a mapping's
    content is an unordered set of key/value pairs), every digest of the record is taken
    over sorted keys, and colonnade reads no meaning from their order. So a manifest with
    its keys in another order (PyYAML's own dump sorts them) is the same manifest: it
    parses equal, checks exact, and shows and loads the same. Any other change of layout
    (indentation, flow style, a duplicated key) is caught by the bytes."""
    ws = _copy(built, tmp_path)
    sorted_text = yaml.safe_dump(built["manifest"])
    assert sorted_text.encode() != built["text"]
    assert yaml.safe_load(sorted_text) == built["manifest"]
    assert main(["show", str(built["ws"])]) == 0
    shown = capsys.readouterr().out.replace(str(built["ws"]), "WS")
    (ws / "manifest.yaml").write_text(sorted_text, encoding="utf-8")
    code, text = _check(ws, capsys, "--trust", built["alice"]["public"])
    assert code == 0 and "all 2 sealed task(s) check exact" in text, text
    assert main(["show", str(ws)]) == 0
    assert capsys.readouterr().out.replace(str(ws), "WS") == shown
    layouts = {
        "indented by 4": yaml.safe_dump(built["manifest"], indent=4, sort_keys=False),
        "flow style": yaml.safe_dump(built["manifest"], default_flow_style=True,
                                     sort_keys=False),
        "a key written twice": built["text"].decode() + "saved: '2020-01-01'\n",
        "a comment": built["text"].decode() + "# reviewed\n",
    }
    for name, text in layouts.items():
        (ws / "manifest.yaml").write_text(text, encoding="utf-8")
        code, out = _check(ws, capsys)
        assert code == 1 and "manifest.yaml" in out, (name, out)


def test_unlisted_files_are_no_part_of_the_workspace(built, tmp_path, capsys):
    """Exemption: a file the manifest does not list is never read (listed files are found
    by their content address), so a stray copy of a weights file with other bytes beside
    the real one, or at the top level where an older layout kept it, changes nothing."""
    ws = _copy(built, tmp_path)
    stray = bytearray(_listed(ws, built, "weights.safetensors").read_bytes())
    stray[-1] ^= 0xFF
    (ws / "data" / f"weights.{'0' * 64}.safetensors").write_bytes(bytes(stray))
    (ws / "weights.safetensors").write_bytes(bytes(stray))
    code, text = _check(ws, capsys, "--trust", built["alice"]["public"])
    assert code == 0 and "all 2 sealed task(s) check exact" in text, text


def test_a_data_folder_replaced_by_a_link_to_a_copy_is_caught(built, tmp_path, capsys):
    ws = _copy(built, tmp_path)
    shutil.move(ws / "data", tmp_path / "elsewhere")
    (ws / "data").symlink_to(tmp_path / "elsewhere")
    _fails_naming(built, ws, capsys, *built["manifest"]["files"])


@pytest.mark.parametrize("verb", ["show", "report", "predict"])
def test_readers_refuse_an_edited_workspace_in_one_sentence(built, tmp_path, capsys, verb):
    ws = _copy(built, tmp_path)
    manifest = copy.deepcopy(built["manifest"])
    manifest["records"]["pump"]["val_accuracy"] = 0.99
    (ws / "manifest.yaml").write_text(manifest_text(manifest), encoding="utf-8")
    args = {"show": ["show", str(ws)],
            "report": ["report", str(ws), "-o", str(tmp_path / "rep"), "--no-pdf",
                       "--no-latency"],
            "predict": ["predict", str(ws), "--task", "pump", "--data",
                        str(built["root"] / "pump_probe.npz"), "-o", str(tmp_path / "p.csv")],
            }[verb]
    assert main(args) == 2
    out, err = capsys.readouterr()
    assert "record does not verify" in err and err.count("\n") == 1 and "Traceback" not in err
    assert "records/pump" in err
    assert not (tmp_path / "rep").exists() and not (tmp_path / "p.csv").exists()


# ----------------------------------------------------------------------------- careful forgers
# Edits that recompute the one digest a careless edit would break, each caught by exactly
# one check of the record (found by hand mutations of it: each case fails when that check
# is removed).
def _redigest(entry) -> None:
    entry["entry_sha256"] = record.entry_digest(entry)


def _unsigned_middle_entry_redigested(m) -> None:
    entry = m["history"][5]  # the export: the one step signed by nobody
    assert "signature" not in entry
    entry["bytes"] += 1
    _redigest(entry)


def _head_renumbered(m) -> None:
    head = m["history"][-1]
    head.pop("signature")
    head["seq"] = 9
    _redigest(head)
    m["record"].update(head=head["entry_sha256"], head_signature_sha256=None)


def _section_and_record_state_edited(m) -> None:
    m["records"]["pump"]["val_accuracy"] = 0.99
    m["record"]["state"] = record.state_digests(m)


FORGER_EDITS = {
    "an unsigned entry edited and its digest recomputed": (_unsigned_middle_entry_redigested,
                                                           "history entry 7 "),
    "the head renumbered, its digest and the record's head recomputed": (_head_renumbered,
                                                                          "history entry 7 "),
    "a section edited and the record's state recomputed": (_section_and_record_state_edited,
                                                           "record's state"),
    "a key added to the record section": (lambda m: m["record"].__setitem__("note", "ok"),
                                          "record section"),
    "a section added": (lambda m: m.__setitem__("approvals", {"pump": "yes"}),
                        "manifest section approvals"),
    "a file listed by hand": (lambda m: m["files"].__setitem__(
        "extra.npz", dict(m["files"]["seals.safetensors"])), "files/extra.npz"),
    "a field added to an entry": (lambda m: m["history"][2].__setitem__("approved", True),
                                  "history entry 3 "),
}


@pytest.mark.parametrize("case", list(FORGER_EDITS))
def test_careful_forgers_without_a_key_are_caught_without_trust(built, case):
    edit, named = FORGER_EDITS[case]
    manifest = copy.deepcopy(built["manifest"])
    edit(manifest)
    report = verify_manifest(manifest, b"", "", _digests(built).get, None)
    assert not report.passed and named in report.first, report.first


def test_a_broken_chain_is_never_extended(built):
    """The store's last line: ``extend`` refuses to put a new head on a broken chain (a
    commit would otherwise bless the edit with a fresh digest and signature)."""
    manifest = copy.deepcopy(built["manifest"])
    manifest["history"][2]["task"] = "pump"
    manifest["history"].append({"step": "usage_scored", "time": "2026-01-01T00:00:00+00:00"})
    with pytest.raises(WorkspaceError, match="refusing to save: the record does not verify "
                                             r"\(history entry 3"):
        record.extend(manifest, record.Attribution(verb="usage"))


def test_a_signature_block_verifies_only_as_written(built):
    """``check_signature`` itself, against the ``cryptography`` package's Ed25519: a block
    whose key id is not its key's, or that carries a field more, is refused even where
    the record's binding would catch the edit as well."""
    signer = _mallory(built)
    digest = built["manifest"]["history"][0]["entry_sha256"]
    block = signer.sign(digest)
    public = serialization.load_pem_public_key(Path(built["mallory"]["public"]).read_bytes())
    public.verify(base64.b64decode(block["value"]),
                  b"colonnade record signature\n" + digest.encode())  # the reference
    assert check_signature(block, digest) == (True, signer.key_id)
    assert check_signature(block, "0" * 64) == (False, signer.key_id)
    assert check_signature({**block, "key": built["alice"]["key_id"]}, digest)[0] is False
    assert check_signature({**block, "note": "x"}, digest)[0] is False
    assert check_signature({**block, "algorithm": "rsa"}, digest)[0] is False


def test_the_step_right_after_a_require_signed_seal_must_be_signed(built):
    """``seal --require-signed`` binds every later step, the very next one included."""
    history = copy.deepcopy(built["manifest"]["history"])
    history[4]["require_signed"] = True  # the pump's seal; entry 6, the export, is unsigned
    _, findings, _ = signature_report(history, None)
    assert findings and findings[0].entry == 6, findings
    assert "history entry 6 (artifact_exported) is unsigned, but history entry 5 " \
           "(task_sealed pump v1) requires every later step to be signed" in findings[0].message
    # signed, but by a key the reader does not trust, while the head is alice's
    _sign_with_mallory(built, {"history": history}, 5)
    _, findings, _ = signature_report(history, [load_trusted(built["alice"]["public"])])
    assert any(f.entry == 6 and f"is signed by key {built['mallory']['key_id']}, which is "
               f"not trusted, but history entry 5" in f.message for f in findings), findings


def test_an_export_can_be_signed_where_every_step_must_be(built, tmp_path, capsys):
    """The export's history entry is attributed and signed like every other step; before,
    ``export`` took no key, so a workspace sealed with --require-signed could not export."""
    ws = _copy(built, tmp_path)
    seal_workspace(ws, "pump", str(built["root"] / "pump_probe.npz"), reason="lock it down",
                   require_signed=True, accept_low_accuracy=True, sign=built["alice"]["key"])
    out = tmp_path / "pump.onnx"
    with pytest.raises(UsageError, match="requires every later step to be signed"):
        export_artifact(ws, out, task="pump")
    assert not out.exists()
    assert main(["export", str(ws), "--task", "pump", "-o", str(out), "--by", "Alice",
                 "--sign", built["alice"]["key"]]) == 0
    capsys.readouterr()
    entry = yaml.safe_load((ws / "manifest.yaml").read_text())["history"][-1]
    assert entry["step"] == "artifact_exported" and entry["by"] == "Alice"
    assert entry["signature"]["key"] == built["alice"]["key_id"]
    code, text = _check(ws, capsys, "--trust", built["alice"]["public"])
    assert code == 0, text


# ----------------------------------------------------------------------------- seals alone
def test_a_seal_checked_alone_names_a_wrong_probe_and_edited_figures(built):
    """``check_seal`` on its own (as ``check_net`` runs it on a network in memory, with
    probes the caller read): a probe file other than the sealed one is 'unverified', not
    compared; a seal whose metrics were edited and whose own digest was recomputed (a
    careful forger in a workspace without signatures) is 'moved' on its metrics."""
    net = colonnade.load(built["ws"])
    other = load_probe(built["root"] / "station_probe.npz", net, "station")
    wrong = load_probe(built["root"] / "pump_train.npz", net, "pump")
    report = check_net(net, {"station": other, "pump": wrong})
    assert [t.verdict for t in report.tasks] == ["exact", "unverified"], report.tasks
    assert "changed since seal v1" in report.tasks[1].failures[0]
    entry = copy.deepcopy(latest_seal(net, "pump"))
    confusion = entry["metrics"]["confusion"]
    confusion[0][0], confusion[0][1] = confusion[0][0] - 1, confusion[0][1] + 1
    entry["entry_sha256"] = seal_entry_digest(entry)
    probe, problem = probe_for(net, "pump", entry)
    assert problem is None
    result = check_seal(net, "pump", entry, probe)
    assert result.verdict == "moved" and result.max_abs_diff == 0.0, result
    assert any("probe metrics moved" in f for f in result.failures), result.failures


def test_a_seal_records_the_threads_and_batch_its_reference_was_computed_with(built):
    """Invariant 8: the seal says how its reference was computed, as torch reports it
    (``torch.get_num_threads``), and a check repeats exactly that."""
    net = colonnade.load(built["ws"])
    probe = load_probe(built["root"] / "pump_probe.npz", net, "pump")
    before = torch.get_num_threads()
    torch.set_num_threads(2)
    try:
        entry = seal_task(net, "pump", probe, batch_size=4, reason="threads",
                          accept_low_accuracy=True)
        assert entry["computation"]["threads"] == torch.get_num_threads() == 2
    finally:
        torch.set_num_threads(before)
    assert entry["computation"]["batch_size"] == 4
    kept, problem = probe_for(net, "pump", entry)
    assert problem is None and check_seal(net, "pump", entry, kept).verdict == "exact"
