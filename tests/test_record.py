"""The record: a digest chain over every byte, signatures, attribution, provenance.

One signed 3-task workspace is built per module (digits from scikit-learn) and copied for
each tampering. Signatures are cross-checked with the ``cryptography`` package's own
Ed25519 verification; the login name and host with Python's ``getpass`` and ``socket``;
file digests with ``hashlib``. Our own code is never the reference for what it computes.
"""

from __future__ import annotations

import base64
import copy
import getpass
import hashlib
import os
import shutil
import socket
import stat
import tarfile

import numpy as np
import pytest
import yaml
from conftest import DIGITS_SPEC, permuted_digit_tasks, write_npz
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization

import colonnade
from colonnade.app.evidence import check_workspace, seal_workspace, unseal_workspace
from colonnade.app.record import history, new_key, verify_record
from colonnade.app.trim import trim_workspace
from colonnade.app.workspace import grow_workspace, new_workspace
from colonnade.cli import main
from colonnade.errors import SealedError, UsageError, WorkspaceError
from colonnade.evidence import record
from colonnade.files.manifest import manifest_text
from colonnade.files.store import listed_files
from colonnade.model.spec import parse_spec

TASKS = 3
EPOCHS = 3


@pytest.fixture(scope="module")
def signed(tmp_path_factory):
    """A 3-task workspace, every step signed by 'alice', every task sealed."""
    root = tmp_path_factory.mktemp("record")
    spec = root / "spec.yaml"
    spec.write_text(yaml.safe_dump(DIGITS_SPEC))
    alice = new_key(root / "alice")
    mallory = new_key(root / "mallory")
    data = {}
    for t in permuted_digit_tasks(TASKS):
        train = write_npz(root / f"{t['name']}.npz", t)
        probe = write_npz(root / f"{t['name']}_probe.npz",
                          {"x": t["x_test"], "y": t["y_test"]})
        data[t["name"]] = (train, probe)
    ws = root / "ws"
    new_workspace(spec, ws, sign=alice["key"])
    for name, (train, probe) in data.items():
        grow_workspace(ws, name, train, epochs=EPOCHS, progress=False, sign=alice["key"],
                       by="Alice Example")
        seal_workspace(ws, name, probe, sign=alice["key"], by="Alice Example")
    return {"root": root, "ws": ws, "alice": alice, "mallory": mallory, "data": data}


def _copy(signed, tmp_path, name="copy"):
    target = tmp_path / name
    shutil.copytree(signed["ws"], target)
    return target


def _manifest(ws):
    return yaml.safe_load((ws / "manifest.yaml").read_text(encoding="utf-8"))


def _write(ws, manifest):
    (ws / "manifest.yaml").write_text(manifest_text(manifest), encoding="utf-8")


# ----------------------------------------------------------------------------- clean
def test_a_signed_workspace_verifies_with_trust_and_cryptography_agrees(signed, capsys):
    report = verify_record(signed["ws"], trust=[signed["alice"]["public"]])
    assert report.passed, report.findings
    # created + 3 x (column_added, task_sealed)
    assert report.entries == 1 + 2 * TASKS
    assert [s.status for s in report.signatures] == ["trusted"] * report.entries
    # The reference: cryptography's own Ed25519 verification with the .pub file as written.
    public = serialization.load_pem_public_key(open(signed["alice"]["public"], "rb").read())
    for entry in _manifest(signed["ws"])["history"]:
        sig = base64.b64decode(entry["signature"]["value"])
        public.verify(sig, b"colonnade record signature\n" + entry["entry_sha256"].encode())
        with pytest.raises(InvalidSignature):
            public.verify(sig, b"colonnade record signature\n" + b"0" * 64)
    assert main(["check", str(signed["ws"]), "--trust", signed["alice"]["public"]]) == 0
    assert "every entry, section and file matches" in capsys.readouterr().out


def test_entries_say_who_when_and_from_which_data(signed):
    entries = history(signed["ws"])
    assert [e.step for e in entries][:3] == ["created", "column_added", "task_sealed"]
    assert entries[0].by == f"{getpass.getuser()}@{socket.gethostname()}"  # the default
    assert {e.by for e in entries[1:]} == {"Alice Example"}
    assert all(e.time and e.sha256 and e.signed for e in entries)
    assert entries[1].prev == entries[0].sha256
    grown = entries[1].details["data"]
    train = signed["data"]["perm0"][0]
    # hashlib over the file is the reference for the recorded SHA-256
    assert grown["train"]["sha256"] == hashlib.sha256(open(train, "rb").read()).hexdigest()
    y = np.load(train)["y"]
    assert grown["train"]["rows"] + grown["val"]["rows"] == len(y)
    assert [a + b for a, b in zip(grown["train"]["class_counts"],
                                  grown["val"]["class_counts"], strict=True)] == \
        np.bincount(y, minlength=10).tolist()
    assert grown["train"]["shape"] == [64] and grown["train"]["dtype"] == "float32"


def test_key_files_modes_and_passphrase(tmp_path, monkeypatch):
    made = new_key(tmp_path / "k")
    assert stat.S_IMODE(os.stat(made["key"]).st_mode) == 0o600
    with pytest.raises(UsageError, match="exists already"):
        new_key(tmp_path / "k")
    locked = new_key(tmp_path / "locked", passphrase="correct horse")
    head = open(locked["key"], "rb").read()
    assert b"ENCRYPTED" in head  # PKCS#8 encrypted PEM, as cryptography writes it
    from colonnade.app.transaction import signer_from
    monkeypatch.setenv("COLONNADE_KEY_PASSPHRASE", "wrong")
    with pytest.raises(UsageError, match="passphrase is wrong"):
        signer_from(locked["key"])
    monkeypatch.setenv("COLONNADE_KEY_PASSPHRASE", "correct horse")
    assert signer_from(locked["key"]).key_id == locked["key_id"]


# ----------------------------------------------------------------------------- tamper cases
def _first_seal(m):
    return next(iter(m["seals"]))


TAMPERS = {
    "seal entry deleted": (lambda m: m["seals"].pop(_first_seal(m)), "seals/perm0"),
    "unsealed added": (lambda m: m["seals"]["perm1"][0].__setitem__(
        "unsealed", {"time": "2026-01-01T00:00:00+00:00", "reason": "x"}), "seals/perm1"),
    "seals section deleted": (lambda m: m.pop("seals"), "seals/perm0"),
    "closure digest in history": (lambda m: m["history"][2].__setitem__(
        "closure_sha256", "0" * 64), "history entry 3 (task_sealed perm0 v1)"),
    "training record accuracy": (lambda m: m["records"]["perm0"].__setitem__(
        "val_accuracy", 0.9975), "history entry 2"),  # the entry and the section both moved
    "accuracy matrix": (lambda m: m["history"][3]["val_accuracies"].__setitem__(
        "perm0", 0.99), "history entry 4 (column_added perm1)"),
    "task mode": (lambda m: m["network"]["tasks"][1].__setitem__("mode", "head"),
                  "network/tasks"),
    "file digest": (lambda m: m["files"]["weights.safetensors"].__setitem__(
        "sha256", "0" * 64), "files/weights.safetensors"),
}


@pytest.mark.parametrize("case", list(TAMPERS))
def test_each_hand_edit_is_caught_and_named(signed, tmp_path, case, capsys):
    edit, named = TAMPERS[case]
    ws = _copy(signed, tmp_path)
    manifest = _manifest(ws)
    if case == "training record accuracy":  # the record and the history both carry it
        manifest["history"][1]["val_accuracy"] = 0.9975
    edit(manifest)
    _write(ws, manifest)
    assert main(["check", str(ws)]) == 1
    out = capsys.readouterr().out
    assert "record: does not verify" in out and named in out
    # readers refuse it too, in one sentence, rather than print a forged figure
    assert main(["show", str(ws)]) == 2
    err = capsys.readouterr().err
    assert "record does not verify" in err and err.count("\n") == 1
    with pytest.raises(WorkspaceError, match="record does not verify"):
        colonnade.load(ws)


def test_bit_flips_in_a_tensor_file_are_caught(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    path = listed_files(ws)["validation.safetensors"]
    data = bytearray(path.read_bytes())
    # four through the command line; the battery below flips many more through the API
    for position in np.linspace(0, len(data) * 8 - 1, 4).astype(int):
        flipped = bytearray(data)
        flipped[position // 8] ^= 1 << (position % 8)
        path.write_bytes(flipped)
        assert main(["check", str(ws)]) == 1
        assert "file validation.safetensors" in capsys.readouterr().out
    path.write_bytes(data)
    assert main(["check", str(ws)]) == 0


def test_an_edit_that_parses_alike_is_caught_by_the_bytes(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    text = (ws / "manifest.yaml").read_text()
    (ws / "manifest.yaml").write_text(text.replace("format: colonnade-workspace",
                                                   "format:  colonnade-workspace", 1))
    assert yaml.safe_load((ws / "manifest.yaml").read_text()) == yaml.safe_load(text)
    assert main(["check", str(ws)]) == 1
    assert "manifest.yaml line 1 is not as colonnade wrote it" in capsys.readouterr().out


# ----------------------------------------------------------------------------- signatures
def _forge(ws, keep_signatures: bool) -> None:
    """Rewrite a training figure and recompute every digest, without the private key."""
    manifest = _manifest(ws)
    manifest["records"]["perm1"]["val_accuracy"] = 0.9999
    history = manifest["history"]
    for entry in history[3:]:  # from entry 4 (column_added perm1) on
        for key in ("entry_sha256", "signature", "prev_sha256", "state_sha256", "seq"):
            if key != "signature" or not keep_signatures:
                entry.pop(key, None)
    keep = [e.pop("signature", None) for e in history[3:]] if keep_signatures else []
    record.extend(manifest, record.Attribution(verb="forged"))
    # extend() appends nothing new here because entries 4.. are pending; it re-chains them
    manifest["history"] = [e for e in manifest["history"] if e.get("step") != "forged"]
    for entry, sig in zip(history[3:], keep, strict=False):
        entry["signature"] = sig
    manifest["record"]["length"] = len(manifest["history"])
    manifest["record"]["head"] = manifest["history"][-1]["entry_sha256"]
    _write(ws, manifest)


def test_a_forger_without_the_key_is_caught_only_by_trust(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    _forge(ws, keep_signatures=False)
    # The threat model: recomputed digests fool the chain alone ...
    assert verify_record(ws).passed
    # ... but not a reader who trusts alice's key: one sentence naming the first entry.
    report = verify_record(ws, trust=[signed["alice"]["public"]])
    assert not report.passed
    assert report.first.startswith("history entry 4 (column_added perm1) and the 3 after it "
                                   "are not signed by a trusted key")
    assert main(["check", str(ws), "--trust", signed["alice"]["public"]]) == 1
    capsys.readouterr()
    ws2 = _copy(signed, tmp_path, "copy2")
    _forge(ws2, keep_signatures=True)  # old signatures left in place no longer verify
    report = verify_record(ws2)
    assert not report.passed and report.findings[0].entry == 4
    assert "signature" in report.first and "does not verify" in report.first


def test_a_step_signed_by_a_foreign_key_is_reported(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    unseal_workspace(ws, "perm2", "retrain on new data", sign=signed["mallory"]["key"])
    report = verify_record(ws, trust=[signed["alice"]["public"]])
    assert not report.passed
    assert signed["mallory"]["key_id"] in report.first and "not among the --trust" in report.first
    # trusting both keys accepts it
    assert verify_record(ws, trust=[signed["alice"]["public"],
                                    signed["mallory"]["public"]]).passed


def test_a_seal_can_require_signed_steps(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    seal_workspace(ws, "perm2", signed["data"]["perm2"][1], reason="require signatures",
                   require_signed=True, sign=signed["alice"]["key"])
    with pytest.raises(UsageError, match="requires every later step to be signed"):
        unseal_workspace(ws, "perm2", "no key")
    unseal_workspace(ws, "perm2", "with key", sign=signed["alice"]["key"])
    assert verify_record(ws, trust=[signed["alice"]["public"]]).passed


# ----------------------------------------------------------------------------- seals
def test_resealing_needs_a_reason_and_says_what_differs(signed, tmp_path):
    ws = _copy(signed, tmp_path)
    probe = signed["data"]["perm0"][1]
    with pytest.raises(UsageError, match="needs --reason") as refused:
        seal_workspace(ws, "perm0", probe)
    assert "the closure is unchanged" in str(refused.value)
    entry = seal_workspace(ws, "perm0", probe, reason="yearly review")
    assert entry["version"] == 2 and "the probe is the same file" in entry["changes"]
    step = history(ws)[-1]
    assert step.reason == "yearly review" and step.details["changes"] == entry["changes"]


def test_a_wrong_probe_is_refused_naming_both_figures(signed, tmp_path):
    ws = _copy(signed, tmp_path)
    wrong = signed["data"]["perm1"][1]  # another task's probe: other pixel order
    with pytest.raises(UsageError, match=r"probe accuracy 0\.\d+ is far below the task's "
                                         r"validation accuracy 0\.\d+"):
        seal_workspace(ws, "perm0", wrong, reason="x")
    entry = seal_workspace(ws, "perm0", wrong, reason="x", accept_low_accuracy=True)
    assert entry["version"] == 2


def test_unseal_and_trim_need_reasons(signed, tmp_path, capsys):
    ws = _copy(signed, tmp_path)
    with pytest.raises(UsageError, match="reason"):
        unseal_workspace(ws, "perm2", " ")
    unseal_workspace(ws, "perm2", "trim it")
    assert main(["trim", str(ws), "--task", "perm2", "--data", signed["data"]["perm2"][1]]) == 2
    err = capsys.readouterr().err
    assert "--reason" in err and err.count("\n") == 1
    with pytest.raises(UsageError, match="reason"):
        trim_workspace(ws, "perm2", signed["data"]["perm2"][1], reason="  ")


def test_the_guard_covers_the_architecture_of_a_sealed_closure(signed, tmp_path):
    ws = _copy(signed, tmp_path)
    net = colonnade.load(ws)
    changed = copy.deepcopy(DIGITS_SPEC)
    changed["lateral"]["activation"] = "tanh"
    net.spec = parse_spec(changed)
    with pytest.raises(SealedError, match=r"seal v1.*architecture.*lateral\.activation"):
        colonnade.save(net, ws)


# ----------------------------------------------------------------------------- travel
def test_a_copied_or_tarred_workspace_checks_exact_on_its_own(signed, tmp_path):
    moved = _copy(signed, tmp_path, "elsewhere")
    hidden = tmp_path / "hidden"
    hidden.mkdir()
    originals = [name for name in os.listdir(signed["root"]) if name.endswith("_probe.npz")]
    assert len(originals) == TASKS
    for name in originals:  # the original probes are gone while the copies are checked
        os.replace(signed["root"] / name, hidden / name)
    try:
        report = check_workspace(moved)
        assert report.passed and {t.verdict for t in report.tasks} == {"exact"}
        archive = tmp_path / "ws.tar"
        with tarfile.open(archive, "w") as tar:
            tar.add(signed["ws"], arcname="ws")
        unpacked = tmp_path / "unpacked"
        with tarfile.open(archive) as tar:
            tar.extractall(unpacked, filter="data")
        report = check_workspace(unpacked / "ws", trust=[signed["alice"]["public"]])
        assert report.passed and {t.verdict for t in report.tasks} == {"exact"}
    finally:
        for name in originals:
            os.replace(hidden / name, signed["root"] / name)
    probes = {n: p for n, p in listed_files(unpacked / "ws").items() if n.startswith("probe-")}
    assert len(probes) == TASKS
    for name, path in probes.items():  # content-addressed: the name is the file's SHA-256
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        assert name == f"probe-{digest}.npz"
        assert path.parent.name == "data" and digest in path.name


def test_check_data_says_whether_a_file_is_the_training_data(signed, capsys):
    train0, _ = signed["data"]["perm0"]
    train1, _ = signed["data"]["perm1"]
    assert main(["check", str(signed["ws"]), "--task", "perm0", "--data", train0]) == 0
    assert "training data file of the task, byte for byte" in capsys.readouterr().out
    assert main(["check", str(signed["ws"]), "--task", "perm0", "--data", train1]) == 1
    assert "is not the data the task was trained" in capsys.readouterr().out


# ----------------------------------------------------------------------------- battery
# A generated battery over the signed 3-task workspace: every field of every history entry
# edited, every entry deleted, neighbours swapped, the chain truncated at every length,
# every manifest section and item edited, and one-bit flips spread over every workspace
# file. Each must be caught and named. COLONNADE_FULL_BATTERY=1 flips many more bits.
FLIPS_PER_FILE = 2048 if os.environ.get("COLONNADE_FULL_BATTERY") else 48


def _changed(value):
    """The same field with another value of its kind."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, (int, float)):
        return value + 1
    if isinstance(value, str):
        return value + "x"
    if isinstance(value, list):
        return value + ["x"]
    if isinstance(value, dict):
        return {**value, "x": 1}
    return "x"


def _battery_verify(manifest, digests, trust=None):
    """The record's checks on a manifest as an attacker would write it: canonical bytes."""
    from colonnade.evidence.integrity import verify_manifest
    from colonnade.evidence.signing import load_trusted

    trusted = [load_trusted(p) for p in trust or []]
    return verify_manifest(manifest, b"", "", digests.get, trusted)


def test_battery_of_record_edits_is_caught_and_named(signed):
    base = _manifest(signed["ws"])
    listed = listed_files(signed["ws"])
    digests = {name: hashlib.sha256(listed[name].read_bytes()).hexdigest()
               for name in base["files"]}
    assert _battery_verify(base, digests).passed
    n = len(base["history"])
    counts = {"edited fields": 0, "deleted": 0, "swapped": 0, "truncated": 0, "sections": 0}
    for i in range(1, n + 1):
        for key in list(base["history"][i - 1]):
            m = copy.deepcopy(base)
            m["history"][i - 1][key] = _changed(m["history"][i - 1][key])
            report = _battery_verify(m, digests)
            assert report.findings and report.findings[0].entry == i, (i, key)
            assert f"history entry {i} " in report.first, report.first
            counts["edited fields"] += 1
        m = copy.deepcopy(base)
        del m["history"][i - 1]
        report = _battery_verify(m, digests)
        assert report.findings and report.findings[0].entry == min(i, n - 1), (i, report.first)
        counts["deleted"] += 1
        if i < n:
            m = copy.deepcopy(base)
            h = m["history"]
            h[i - 1], h[i] = h[i], h[i - 1]
            report = _battery_verify(m, digests)
            assert report.findings and report.findings[0].entry == i, (i, report.first)
            counts["swapped"] += 1
            m = copy.deepcopy(base)
            del m["history"][i:]
            report = _battery_verify(m, digests)
            assert "removed from or added at the end" in report.first
            counts["truncated"] += 1
    for section, value in base.items():
        if section == "history":
            continue
        children = list(value) if isinstance(value, dict) else [None]
        for child in children:
            m = copy.deepcopy(base)
            if child is None:
                m[section] = _changed(value)
            else:
                m[section][child] = _changed(value[child])
            report = _battery_verify(m, digests)
            where = section if child is None or section == "record" else f"{section}/{child}"
            assert not report.passed and where in report.first, (where, report.first)
            counts["sections"] += 1
    print(f"record battery: {counts} caught and named, of "
          f"{sum(counts.values())} edits")  # for the issue note (pytest -s)
    assert counts["edited fields"] >= 10 * n


def test_battery_of_bit_flips_in_every_file_is_caught_and_named(signed, tmp_path):
    from colonnade.app.record import _digest_reader
    from colonnade.evidence.integrity import verify_manifest

    ws = _copy(signed, tmp_path)
    text = (ws / "manifest.yaml").read_bytes()
    base = yaml.load(text, Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))
    names = ["manifest.yaml", *base["files"]]
    assert len(names) == 1 + 3 + TASKS  # weights, validation, seals, one probe per task
    caught = total = 0
    listed = listed_files(ws)
    for name in names:
        path = ws / name if name == "manifest.yaml" else listed[name]
        data = path.read_bytes()
        positions = np.unique(np.linspace(0, len(data) * 8 - 1, FLIPS_PER_FILE).astype(int))
        for position in positions:
            flipped = bytearray(data)
            flipped[position // 8] ^= 1 << (position % 8)
            total += 1
            if name == "manifest.yaml":
                try:  # the C loader when present: the same safe constructor, only faster
                    m = yaml.load(bytes(flipped).decode("utf-8"),
                                  Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))
                except (yaml.YAMLError, UnicodeDecodeError):
                    caught += 1  # read_manifest refuses it, naming manifest.yaml
                    continue
                if not isinstance(m, dict):
                    caught += 1
                    continue
                # manifest_text is a function of the parsed value: equal values, equal text
                canonical = text.decode() if m == base else manifest_text(m)
                report = verify_manifest(m, bytes(flipped), canonical,
                                         _digest_reader(ws, m.get("files")))
            else:
                path.write_bytes(flipped)
                report = verify_manifest(base, text, text.decode(),
                                         _digest_reader(ws, base["files"]))
                path.write_bytes(data)
                assert report.first and f"file {name}" in report.first, report.first
            assert not report.passed, (name, position)
            caught += 1
    print(f"bit-flip battery: {caught} of {total} one-bit flips caught and named over "
          f"{len(names)} files")
    assert caught == total


def test_key_new_from_the_command_line(tmp_path, capsys):
    assert main(["key", "new", "-o", str(tmp_path / "bob")]) == 0
    out = capsys.readouterr().out
    assert "bob.key" in out and "bob.pub" in out
    # cryptography reads both files back as an Ed25519 pair (the reference)
    private = serialization.load_pem_private_key((tmp_path / "bob.key").read_bytes(), None)
    public = serialization.load_pem_public_key((tmp_path / "bob.pub").read_bytes())
    public.verify(private.sign(b"x"), b"x")
    assert main(["key", "new", "-o", str(tmp_path / "bob")]) == 2  # never overwritten
    err = capsys.readouterr().err
    assert "exists already" in err and err.count("\n") == 1
