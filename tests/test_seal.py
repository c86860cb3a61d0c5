"""Seals on scikit-learn's bundled digits: every sealed task checks exact, always.

Outside references: the UCI handwritten digits shipped in scikit-learn
(``sklearn.datasets.load_digits``); SHA-256 as computed by Python's ``hashlib``
(FIPS 180-4); scikit-learn's ``confusion_matrix`` / ``recall_score`` / ``accuracy_score``
for the probe metrics; and torch's own byte view of a tensor for "bit for bit".
"""

from __future__ import annotations

import copy
import hashlib
import io
import struct

import numpy as np
import pytest
import torch
from conftest import DIGITS_SPEC, permuted_digit_tasks, split_digit_tasks, task_data

import colonnade
from colonnade.app.evidence import check_workspace
from colonnade.evidence import seal
from colonnade.evidence.verify import check_net
from colonnade.files import store
from colonnade.model import guard
from colonnade.model.digest import closure_digests, raw_bytes, tensor_digest
from colonnade.training.fit import EVAL_BATCH

EPOCHS = 3  # few epochs: these tests are about bits, not accuracy


def digits_spec(optimizer: str = "adamw", lateral: str = "nonlinear") -> dict:
    """The conftest digits template (dense, batch norm, relu, dropout, dense, relu)."""
    raw = copy.deepcopy(DIGITS_SPEC)
    raw["lateral"] = ({"kind": "nonlinear", "reduce": 0.5} if lateral == "nonlinear"
                      else {"kind": lateral})
    if optimizer == "sgd":
        raw["train"] = {"optimizer": "sgd", "lr": 0.05, "momentum": 0.9,
                        "weight_decay": 0.0005, "epochs": EPOCHS, "batch_size": 64,
                        "patience": 0, "seed": 0}
    else:
        raw["train"] = {"optimizer": "adamw", "lr": 0.002, "weight_decay": 0.01,
                        "epochs": EPOCHS, "batch_size": 64, "patience": 0, "seed": 0}
    return raw


def write_probe(folder, task: dict) -> str:
    path = folder / f"{task['name']}_probe.npz"
    np.savez(path, x=task["x_test"], y=task["y_test"])
    return str(path)


def grow_and_seal(net, task: dict, probe_path: str, workspace=None) -> dict:
    colonnade.grow(net, task["name"], task_data(task), epochs=EPOCHS, progress=False)
    probe = seal.load_probe(probe_path, net, task["name"], relative_to=workspace)
    return seal.seal_task(net, task["name"], probe)


def assert_all_exact(report) -> None:
    bad = {t.task: (t.verdict, t.failures) for t in report.tasks if t.verdict != "exact"}
    assert not bad, bad
    assert report.passed


def reference_of(net, task: str) -> torch.Tensor:
    key = guard.latest_seal(net, task)["reference"]["key"]
    return net.attachments[seal.SEALS_FILE][key]


# ----------------------------------------------------------------------------- sequences
@pytest.mark.parametrize("sequence,optimizer,lateral", [
    ("permuted", "adamw", "nonlinear"),
    ("permuted", "sgd", "linear"),
    ("split", "adamw", "linear"),
    ("split", "sgd", "nonlinear"),
])
def test_every_sealed_task_checks_exact_through_growth_save_load_and_one_pass(
        tmp_path, sequence, optimizer, lateral):
    tasks = permuted_digit_tasks(5) if sequence == "permuted" else split_digit_tasks()
    net = colonnade.ProgressiveNet(colonnade.parse_spec(digits_spec(optimizer, lateral)))
    probes = {}
    for t in tasks:
        path = write_probe(tmp_path, t)
        grow_and_seal(net, t, path)
        probes[t["name"]] = seal.load_probe(path, net, t["name"])
        # After every growth step, every task sealed so far checks exact ...
        assert_all_exact(check_net(net, probes))
        for name, probe in probes.items():  # ... and, independently, byte for byte
            again = colonnade.training.fit.task_logits(net, name, probe.x, EVAL_BATCH)
            assert raw_bytes(again) == raw_bytes(reference_of(net, name)), name
    assert len(guard.sealed_tasks(net)) == len(tasks)

    ws = tmp_path / "ws"
    ws.mkdir()
    store.save(net, ws)
    back = store.load(ws)
    assert_all_exact(check_net(back, probes))
    assert_all_exact(check_workspace(ws))

    # One pass over all tasks (each column computed once) against per-task inference,
    # in the seal's batch size: the same bits.
    for name, probe in probes.items():
        parts = [back.forward_all(probe.x[i:i + EVAL_BATCH])[name]
                 for i in range(0, probe.x.shape[0], EVAL_BATCH)]
        assert raw_bytes(torch.cat(parts)) == raw_bytes(reference_of(back, name)), name


# ----------------------------------------------------------------------------- a workspace
@pytest.fixture(scope="module")
def sealed_ws(tmp_path_factory):
    """Two permuted-digit tasks with nonlinear laterals, both sealed, plus an unsealed third."""
    root = tmp_path_factory.mktemp("sealed")
    tasks = permuted_digit_tasks(3)
    ws = root / "ws"
    net = store.create(digits_spec("adamw", "nonlinear"), ws)
    for t in tasks[:2]:
        grow_and_seal(net, t, write_probe(root, t), workspace=ws)
    colonnade.grow(net, tasks[2]["name"], task_data(tasks[2]), epochs=1, progress=False)
    store.save(net, ws)
    # The probe's samples are kept inside the workspace in a file named by its own
    # SHA-256; the source's SHA-256 and path are kept for information (hashlib is the
    # reference for both digests, numpy's own reader for the kept arrays).
    probe = guard.latest_seal(net, "perm0")["probe"]
    source = root / "perm0_probe.npz"
    assert probe["sha256"] == hashlib.sha256(source.read_bytes()).hexdigest()
    kept = kept_file(ws, probe["file"]).read_bytes()
    assert probe["file"] == f"probe-{hashlib.sha256(kept).hexdigest()}.npz"
    assert probe["file_sha256"] == hashlib.sha256(kept).hexdigest()
    assert probe["source"] == "../perm0_probe.npz"
    with np.load(io.BytesIO(kept), allow_pickle=False) as z, np.load(source) as original:
        assert z["x"].dtype == np.float32 and z["y"].dtype == np.int64
        assert z["x"].tobytes() == original["x"].astype(np.float32).tobytes()
        assert z["y"].tolist() == original["y"].tolist()
    return root


def kept_file(ws, name: str):
    """Where the store keeps the workspace file ``name`` (found by its name's stem, so the
    test holds whatever folder layout the store uses)."""
    stem = name.split(".")[0]
    found = [p for p in ws.rglob(f"{stem}*") if p.is_file() and not p.name.endswith(".prev")]
    assert len(found) == 1, found
    return found[0]


@pytest.fixture
def ws(sealed_ws, tmp_path):
    import shutil

    shutil.copytree(sealed_ws, tmp_path / "copy")
    return tmp_path / "copy" / "ws"


def flip_bit(path, key: str, byte: int = 0, bit: int = 0) -> None:
    """Flip one bit of a tensor inside a safetensors file.

    Layout from the safetensors format: an 8-byte little-endian header length, a JSON
    header mapping each key to ``data_offsets`` [begin, end) into the byte buffer after it.
    """
    data = bytearray(path.read_bytes())
    (n,) = struct.unpack("<Q", data[:8])
    import json

    header = json.loads(data[8:8 + n])
    begin, end = header[key]["data_offsets"]
    assert begin + byte < end
    data[8 + n + begin + byte] ^= 1 << bit
    path.write_bytes(bytes(data))


def test_the_fixture_checks_exact(ws):
    report = check_workspace(ws)
    assert [t.task for t in report.tasks] == ["perm0", "perm1"]
    assert_all_exact(report)
    assert not report.notes


# Every kind of tensor in a sealed closure: weight, bias, norm statistics and affine
# parameters, the nonlinear adapter's scalar scale alpha and its maps, the head.
TAMPER = [
    ("columns.0.blocks.0.weighted.weight", {"perm0", "perm1"}),
    ("columns.0.blocks.0.weighted.bias", {"perm0", "perm1"}),
    ("columns.0.blocks.0.post.0.running_mean", {"perm0", "perm1"}),
    ("columns.0.blocks.0.post.0.running_var", {"perm0", "perm1"}),
    ("columns.0.blocks.0.post.0.num_batches_tracked", {"perm0", "perm1"}),
    ("columns.0.blocks.0.post.0.weight", {"perm0", "perm1"}),
    ("columns.1.blocks.1.weighted.weight", {"perm1"}),
    ("adapters.c1_b1_from_c0.alpha", {"perm1"}),
    ("adapters.c1_b1_from_c0.V.weight", {"perm1"}),
    ("adapters.h_perm1_from_c0.U.weight", {"perm1"}),
    ("heads.perm0.weight", {"perm0"}),
    ("heads.perm1.bias", {"perm1"}),
]


@pytest.mark.parametrize("key,hit", TAMPER)
def test_a_one_bit_flip_is_caught_and_named(ws, key, hit):
    flip_bit(store.listed_files(ws)[store.WEIGHTS], key)  # the lowest bit of the first byte: the smallest change
    report = check_workspace(ws)
    for t in report.tasks:
        if t.task in hit:
            assert t.verdict == "moved"
            assert any(f"tensor {key!r} in weights.safetensors" in f for f in t.failures), \
                t.failures
        else:
            assert t.verdict == "exact", t.failures
    assert not report.passed
    assert any("weights.safetensors" in n for n in report.notes)


def test_a_flip_outside_every_sealed_closure_keeps_seals_exact_but_fails_the_record(ws):
    flip_bit(store.listed_files(ws)[store.WEIGHTS], "columns.2.blocks.0.weighted.weight")  # unsealed perm2
    report = check_workspace(ws)
    assert {t.verdict for t in report.tasks} == {"exact"}
    # every byte of the workspace is bound to the record, sealed or not
    assert not report.passed and "file weights.safetensors" in report.record.first
    assert any("weights.safetensors" in n for n in report.notes)


def kept_probe(ws, task: str):
    return kept_file(ws, guard.latest_seal(store.load(ws), task)["probe"]["file"])


def test_a_changed_probe_file_is_named(ws):
    probe = kept_probe(ws, "perm0")
    name = guard.latest_seal(store.load(ws), "perm0")["probe"]["file"]
    with np.load(probe) as z:
        x, y = z["x"].copy(), z["y"]
    x[0, 0] += 1.0
    np.savez(probe, x=x, y=y)
    report = check_workspace(ws)
    assert not report.passed and name in report.record.first
    by = {t.task: t for t in report.tasks}
    assert by["perm0"].verdict == "unverified"
    assert any(name in f and "changed" in f for f in by["perm0"].failures)
    assert by["perm1"].verdict == "exact"


def test_the_original_probe_file_is_not_needed(ws):
    (ws.parent / "perm0_probe.npz").unlink()
    (ws.parent / "perm1_probe.npz").unlink()
    assert_all_exact(check_workspace(ws))


def test_a_missing_probe_file_is_named_and_can_be_given(ws, tmp_path):
    probe = kept_probe(ws, "perm1")
    moved = tmp_path / "elsewhere.npz"
    probe.rename(moved)
    report = check_workspace(ws)
    assert not report.passed and "is missing" in report.record.first
    by = {t.task: t for t in report.tasks}
    assert by["perm1"].verdict == "unverified"
    assert any("is not among the workspace's files" in f for f in by["perm1"].failures)
    given = check_workspace(ws, task="perm1", probe=moved)
    assert [t.verdict for t in given.tasks] == ["exact"] and not given.record.passed


def test_a_changed_stored_reference_is_named(ws):
    flip_bit(store.listed_files(ws)[seal.SEALS_FILE], "perm1/v1", byte=3, bit=6)
    by = {t.task: t for t in check_workspace(ws).tasks}
    assert by["perm1"].verdict == "unverified"
    assert any("'perm1/v1'" in f and "reference" in f for f in by["perm1"].failures)
    assert by["perm0"].verdict == "exact"


@pytest.mark.parametrize("edit", ["closure_digest", "tensor_digest", "accuracy"])
def test_a_hand_edited_seal_entry_is_named(ws, edit):
    import yaml

    path = ws / store.MANIFEST
    manifest = yaml.safe_load(path.read_text())
    entry = manifest["seals"]["perm0"][0]
    if edit == "closure_digest":
        entry["closure"]["sha256"] = "0" * 64
    elif edit == "tensor_digest":
        entry["closure"]["tensors"]["heads.perm0.bias"] = "0" * 64
    else:
        entry["metrics"]["accuracy"] = 1.0
    path.write_text(yaml.safe_dump(manifest, sort_keys=False))
    by = {t.task: t for t in check_workspace(ws).tasks}
    assert by["perm0"].verdict in ("unverified", "moved")
    assert any("edited" in f and "seal v1" in f for f in by["perm0"].failures)
    assert by["perm1"].verdict == "exact"


def test_check_from_the_command_line_prints_sentences_not_tracebacks(ws, capsys):
    from colonnade.cli import main

    assert main(["check", str(ws)]) == 0
    flip_bit(store.listed_files(ws)[store.WEIGHTS], "adapters.c1_b1_from_c0.alpha")
    assert main(["check", str(ws)]) == 1
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert "'adapters.c1_b1_from_c0.alpha'" in out
    assert main(["check", str(ws), "--json"]) == 1
    import json

    data = json.loads(capsys.readouterr().out)
    verdicts = {t["task"]: t["verdict"] for t in data["tasks"]}
    assert verdicts == {"perm0": "exact", "perm1": "moved"}
    assert set(data["tasks"][1]) >= {"task", "verdict", "max_abs_diff", "failures"}


# ----------------------------------------------------------------------------- tolerance
def _rewrite_reference(ws, task: str, delta: float) -> float:
    """Stand in for a reference computed on other hardware: shift one logit, re-record."""
    net = store.load(ws)
    entry = guard.latest_seal(net, task)
    key = entry["reference"]["key"]
    old = net.attachments[seal.SEALS_FILE][key]
    new = old.clone()
    new[0, 0] += delta
    net.attachments[seal.SEALS_FILE][key] = new
    entry["reference"]["sha256"] = tensor_digest(key, new)
    entry["entry_sha256"] = seal.entry_digest(entry)
    store.save(net, ws)
    return float((new.double() - old.double()).abs().max())


def test_tolerance_accepts_small_differences_and_only_those(ws):
    diff = _rewrite_reference(ws, "perm0", 1e-5)
    assert diff > 0
    strict = {t.task: t for t in check_workspace(ws).tasks}["perm0"]
    assert strict.verdict == "moved" and strict.max_abs_diff == diff
    assert strict.predictions_agree is True
    loose = {t.task: t for t in check_workspace(ws, tolerance=1e-3).tasks}["perm0"]
    assert loose.verdict == "within 0.001" and loose.passed
    tight = {t.task: t for t in check_workspace(ws, tolerance=diff / 2).tasks}["perm0"]
    assert tight.verdict == "moved"


def test_a_flipped_class_is_moved_even_within_tolerance(ws):
    _rewrite_reference(ws, "perm0", 1e3)  # makes class 0 the reference's answer for row 0
    result = {t.task: t for t in check_workspace(ws, tolerance=1e4).tasks}["perm0"]
    assert result.predictions_agree is False
    assert result.verdict == "moved"


# ----------------------------------------------------------------------------- the record
def test_the_seal_records_its_computation_and_check_repeats_it(ws, monkeypatch):
    net = store.load(ws)
    entry = guard.latest_seal(net, "perm1")
    # conftest runs torch with one thread; EVAL_BATCH is colonnade's evaluation batch.
    assert entry["computation"] == {"batch_size": EVAL_BATCH, "threads": 1,
                                    "dtype": "float32", "device": "cpu", "call": "forward"}
    assert entry["environment"]["torch"] == str(torch.__version__)
    assert entry["probe"]["samples"] == 450
    seen = []
    real = seal.task_logits

    def spy(net, task, x, batch_size):
        seen.append((torch.get_num_threads(), batch_size))
        return real(net, task, x, batch_size)

    monkeypatch.setattr(seal, "task_logits", spy)
    torch.set_num_threads(2)
    try:
        assert_all_exact(check_workspace(ws))
    finally:
        torch.set_num_threads(1)
    assert seen == [(1, EVAL_BATCH), (1, EVAL_BATCH)]


def test_the_closure_digest_is_sha256_of_the_documented_serialisation(ws):
    net = store.load(ws)
    state = net.closure_state("perm1")
    whole = hashlib.sha256()  # FIPS 180-4, via hashlib; serialisation as in digest.py
    for key in sorted(state):
        t = state[key].contiguous()
        parts = [key.encode(), str(t.dtype).encode(), struct.pack(f"<{t.dim()}Q", *t.shape),
                 t.reshape(-1).view(torch.uint8).numpy().tobytes()]
        whole.update(b"".join(struct.pack("<Q", len(p)) + p for p in parts))
    entry = guard.latest_seal(net, "perm1")
    assert entry["closure"]["sha256"] == whole.hexdigest()
    assert set(entry["closure"]["tensors"]) == set(state)
    # The closure holds exactly the columns, adapters and head the task depends on.
    assert entry["closure"]["columns"] == [0, 1]
    assert not any(k.startswith(("columns.2.", "heads.perm0.", "heads.perm2.")) for k in state)


def test_digests_see_bits_dtype_and_shape():
    t = torch.arange(6, dtype=torch.float32)
    base = tensor_digest("w", t)
    flipped = t.clone()
    flipped.view(torch.int32)[2] ^= 1
    assert tensor_digest("w", flipped) != base
    assert tensor_digest("w", t.reshape(2, 3)) != base  # same bytes, another shape
    assert tensor_digest("w", t.view(torch.int32)) != base  # same bytes, another dtype
    assert tensor_digest("v", t) != base
    assert tensor_digest("w", torch.tensor([-0.0])) != tensor_digest("w", torch.tensor([0.0]))
    assert closure_digests({"a": t, "b": t})[0] != closure_digests({"ab": t})[0]


def test_probe_metrics_match_scikit_learn():
    from sklearn.metrics import accuracy_score, confusion_matrix, recall_score

    gen = torch.Generator().manual_seed(0)
    logits = torch.randn(200, 4, generator=gen)
    y = torch.randint(0, 3, (200,), generator=gen)  # class 3 never occurs
    m = seal.probe_metrics(logits, y, 4)
    pred = logits.argmax(1).numpy()
    assert m["confusion"] == confusion_matrix(y.numpy(), pred, labels=range(4)).tolist()
    assert m["accuracy"] == pytest.approx(accuracy_score(y.numpy(), pred))
    want = recall_score(y.numpy(), pred, labels=range(3), average=None)
    assert m["recall"][:3] == pytest.approx(list(want))
    assert m["recall"][3] is None


def test_a_task_with_many_classes_keeps_recall_but_no_confusion_matrix():
    """The confusion matrix grows with the square of the class count; above
    CONFUSION_MAX_CLASSES it is not built, and accuracy and recall are counted directly.
    Reference: the accuracy and recall recomputed here with numpy from the same labels."""
    classes = seal.CONFUSION_MAX_CLASSES + 1
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(500, classes, generator=g)
    y = torch.randint(0, classes, (500,), generator=g)
    y[:200] = logits[:200].argmax(1)  # some hits
    metrics = seal.probe_metrics(logits, y, classes)
    pred, labels = logits.argmax(1).numpy(), y.numpy()
    assert metrics["confusion"] is None
    assert metrics["accuracy"] == float((pred == labels).sum()) / 500
    for c in (0, classes - 1):
        rows = labels == c
        want = float((pred[rows] == c).sum()) / float(rows.sum()) if rows.any() else None
        assert metrics["recall"][c] == want
    small = seal.probe_metrics(logits[:, :3], y % 3, 3)
    assert np.array(small["confusion"]).sum() == 500
