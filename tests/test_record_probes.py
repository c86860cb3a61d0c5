"""Every kind of probe is kept inside the workspace, and no path in a manifest is read.

A class folder of PNG digits and a .npy samples file with its .npy labels are sealed;
the workspace then checks exact when copied, tarred and unpacked, with the original data
deleted. A manifest whose (older) seal names a path for its probe never gets that path
opened: Python's own audit events (PEP 578, ``sys.addaudithook``, event ``open``) are the
reference for "opened", and the output is the same whether the named file exists or not.

Outside references: Pillow writes the PNG files, numpy reads the kept arrays back,
hashlib computes every SHA-256, tarfile makes the archive.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
import sys
import tarfile
import time

import numpy as np
import pytest
import yaml
from PIL import Image

from colonnade.app.evidence import check_workspace, seal_workspace
from colonnade.app.workspace import grow_workspace, new_workspace
from colonnade.cli import main
from colonnade.evidence import seal
from colonnade.evidence.kept_probe import pack_probe, short_name, unpack_probe
from colonnade.evidence.verify import check_seal, probe_for
from colonnade.files import store
from colonnade.model import guard

SPEC = {
    "name": "digits-images",
    "input": [1, 8, 8],
    "column": [{"flatten": True}, {"dense": 32}, {"act": "relu"}],
    "lateral": {"kind": "linear"},
    "train": {"epochs": 5, "batch_size": 32, "lr": 0.01, "patience": 0, "seed": 0},
}


def _digits():
    from sklearn.datasets import load_digits

    d = load_digits()
    return (d.images * 15).astype(np.uint8), d.target  # 0..16 -> 0..240, exact in uint8


def _png_folder(root, index) -> None:
    pixels, target = _digits()
    for i in index:
        os.makedirs(root / str(target[i]), exist_ok=True)
        Image.fromarray(pixels[i], mode="L").save(root / str(target[i]) / f"{i:04d}.png")


def _write_data(folder) -> None:
    """Training and probe data; written twice by the fixture, byte for byte alike."""
    pixels, target = _digits()
    _png_folder(folder / "train", range(0, 1000))
    _png_folder(folder / "probe_folder", range(1000, 1160))
    rows = range(1160, 1320)
    np.save(folder / "probe_x.npy", pixels[list(rows)].astype(np.float32)[:, None] / 255)
    np.save(folder / "probe_y.npy", target[list(rows)].astype(np.int64))


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """Task 'a' sealed on a class folder, task 'b' on a .npy and its labels; the data the
    seals read is deleted afterwards (an identical copy stays in ``aside``)."""
    root = tmp_path_factory.mktemp("probes")
    data, aside = root / "data", root / "aside"
    for folder in (data, aside):
        folder.mkdir()
        _write_data(folder)
    (root / "spec.yaml").write_text(yaml.safe_dump(SPEC))
    ws = root / "ws"
    new_workspace(root / "spec.yaml", ws)
    grow_workspace(ws, "a", data / "train", progress=False)
    grow_workspace(ws, "b", data / "train", mode="head", progress=False)
    seal_workspace(ws, "a", data / "probe_folder")
    seal_workspace(ws, "b", data / "probe_x.npy", labels=data / "probe_y.npy")
    shutil.rmtree(data)
    return {"root": root, "ws": ws, "aside": aside, "data": data}


def _copy(made, tmp_path, name="copy"):
    target = tmp_path / name
    shutil.copytree(made["ws"], target)
    return target


def _exact(report) -> None:
    bad = {t.task: (t.verdict, t.failures) for t in report.tasks if t.verdict != "exact"}
    assert not bad and report.passed, (bad, report.record.findings)
    assert sorted(t.task for t in report.tasks) == ["a", "b"]


def _kept_on_disk(ws, name):
    stem = name.split(".")[0]
    found = [p for p in ws.rglob(f"{stem}*") if p.is_file() and not p.name.endswith(".prev")]
    assert len(found) == 1, found
    return found[0]


# ----------------------------------------------------------------------------- kept probes
def test_every_kind_of_probe_is_kept_as_the_samples_the_seal_ran_on(made):
    net = store.load(made["ws"])
    aside = made["aside"]
    # References: Pillow's pixels scaled by numpy (the documented rule) for the folder,
    # numpy's own reading of the .npy files for the pair, hashlib for the digests.
    from colonnade.training.sources import source_digest

    for task, source, labels in (("a", aside / "probe_folder", None),
                                 ("b", aside / "probe_x.npy", aside / "probe_y.npy")):
        probe = guard.latest_seal(net, task)["probe"]
        kept = _kept_on_disk(made["ws"], probe["file"]).read_bytes()
        assert probe["file"] == f"probe-{hashlib.sha256(kept).hexdigest()}.npz"
        assert probe["file_sha256"] == hashlib.sha256(kept).hexdigest()
        assert probe["sha256"] == source_digest(source, labels)
        assert os.path.basename(probe["source"]) == source.name  # information only
        assert "path" not in probe and "labels" not in probe  # nothing check would open
        with np.load(io.BytesIO(kept), allow_pickle=False) as z:
            x, y = z["x"], z["y"]
        assert x.dtype == np.float32 and y.dtype == np.int64 and probe["samples"] == len(y)
        if task == "b":
            assert x.tobytes() == np.load(labels.with_name("probe_x.npy")).tobytes()
            assert y.tolist() == np.load(labels).tolist()
        else:
            pixels, target = _digits()
            order = sorted(range(1000, 1160), key=lambda i: (str(target[i]), f"{i:04d}"))
            expected = pixels[order].astype(np.float32)[:, None] / np.float32(255)
            assert x.tobytes() == expected.tobytes()
            assert y.tolist() == target[order].tolist()
    assert probe["source_labels"].endswith("probe_y.npy")


def test_the_kept_file_is_the_same_bytes_for_the_same_samples(monkeypatch):
    import torch

    x, y = torch.rand(7, 1, 8, 8), torch.tensor([0, 1, 2, 3, 4, 5, 6])
    first = pack_probe(x, y)
    # A zip member carries a time stamp to the second (zipfile takes it from time.time());
    # ours must not. The clock is moved on by an hour instead of waiting for it to tick.
    real = time.time
    monkeypatch.setattr(time, "time", lambda: real() + 3600.0)
    assert pack_probe(x.clone(), y.clone()) == first
    back_x, back_y = unpack_probe(first, (1, 8, 8), 7, "p")
    assert torch.equal(back_x, x) and torch.equal(back_y, y)
    with pytest.raises(Exception, match="labels outside 0..5"):
        unpack_probe(first, (1, 8, 8), 6, "p")
    with pytest.raises(Exception, match="not rows of the network's input"):
        unpack_probe(first, (64,), 7, "p")


def test_a_copied_and_a_tarred_workspace_check_exact_without_the_data(made, tmp_path, capsys):
    assert not made["data"].exists()  # every file the seals were made from is gone
    _exact(check_workspace(_copy(made, tmp_path)))
    net = store.load(made["ws"])
    assert {guard.latest_seal(net, t)["probe"]["file"] for t in "ab"} <= set(net.kept_files)
    archive = tmp_path / "ws.tar"
    with tarfile.open(archive, "w") as tar:
        tar.add(made["ws"], arcname="ws")
    unpacked = tmp_path / "unpacked"
    with tarfile.open(archive) as tar:
        tar.extractall(unpacked, filter="data")
    _exact(check_workspace(unpacked / "ws"))
    assert main(["check", str(unpacked / "ws")]) == 0
    assert "all 2 sealed task(s) check exact" in capsys.readouterr().out


def test_the_kept_copy_is_read_from_the_loaded_bytes_not_from_a_path(made, tmp_path):
    ws = _copy(made, tmp_path)
    net = store.load(ws)
    shutil.rmtree(ws)  # nothing on disk any more: only the bytes the store loaded
    for task in ("a", "b"):
        entry = guard.latest_seal(net, task)
        probe, problem = probe_for(net, task, entry)
        assert problem is None and probe.sha256 == entry["probe"]["sha256"]
        result = check_seal(net, task, entry, probe)
        assert result.verdict == "exact", result.failures


def test_a_changed_kept_probe_is_named_and_the_original_can_be_given(made, tmp_path):
    ws = _copy(made, tmp_path)
    name = guard.latest_seal(store.load(ws), "b")["probe"]["file"]
    path = _kept_on_disk(ws, name)
    data = bytearray(path.read_bytes())
    data[-1] ^= 1  # the last byte of the labels array
    path.write_bytes(bytes(data))
    report = check_workspace(ws)
    by = {t.task: t for t in report.tasks}
    assert by["b"].verdict == "unverified" and by["a"].verdict == "exact"
    assert any(f"the probe kept as {name} changed" in f for f in by["b"].failures)
    given = check_workspace(ws, task="b", probe=made["aside"] / "probe_x.npy",
                            probe_labels=made["aside"] / "probe_y.npy")
    assert [t.verdict for t in given.tasks] == ["exact"]
    given = check_workspace(ws, task="a", probe=made["aside"] / "probe_folder")
    assert [t.verdict for t in given.tasks] == ["exact"]
    other = check_workspace(ws, task="a", probe=made["aside"] / "probe_x.npy",
                            probe_labels=made["aside"] / "probe_y.npy")
    assert other.tasks[0].verdict == "unverified"
    assert "is not the probe of seal v1" in other.tasks[0].failures[0]


# ----------------------------------------------------------------------------- old seals
def _old_style(made, tmp_path, name, probe_entry, task="b"):
    """A copy whose seal of ``task`` names its probe the way older seals did (by path),
    re-chained through the store as a commit would."""
    ws = _copy(made, tmp_path, name)
    net = store.load(ws)
    entry = guard.latest_seal(net, task)
    entry["probe"] = {**probe_entry, "sha256": entry["probe"]["sha256"],
                      "samples": entry["probe"]["samples"]}
    entry["entry_sha256"] = seal.entry_digest(entry)
    store.save(net, ws)
    return ws


HOSTILE = ["/proc/self/pagemap", "../../etc/passwd", "/dev/zero", "EXISTS", "/no/such/file"]


def test_a_path_in_the_manifest_is_never_opened_nor_tested(made, tmp_path, capsys):
    exists = made["aside"] / "probe_x.npy"  # a real file, and the right one at that
    outputs = {}
    opened: list[str] = []
    watching = [False]

    def hook(event, args):
        if watching[0] and event == "open":
            opened.append(str(args[0]))

    sys.addaudithook(hook)  # CPython's audit events: every open() of a file raises "open"
    for n, path in enumerate(HOSTILE):
        path = str(exists) if path == "EXISTS" else path
        ws = _old_style(made, tmp_path, f"old{n}",
                        {"path": path, "labels": path.replace("x.npy", "y.npy")})
        capsys.readouterr()
        watching[0] = True
        started = time.monotonic()
        try:
            code = main(["check", str(ws), "--json"])
        finally:
            watching[0] = False
        elapsed = time.monotonic() - started
        result = json.loads(capsys.readouterr().out)
        assert code == 1 and result["record"]["passed"]
        assert not [o for o in opened if o in (path, path.replace("x.npy", "y.npy"))
                    or o.startswith(("/proc/self/pagemap", "/dev/zero", "/etc/passwd"))]
        # a hang detector, not a speed target: reading /proc/self/pagemap takes hours
        assert elapsed < 120
        outputs[path] = result["tasks"]
    first = next(iter(outputs.values()))
    by = {t["task"]: t for t in first}
    assert by["a"]["verdict"] == "exact" and by["b"]["verdict"] == "unverified"
    assert by["b"]["failures"] == [
        "seal v1 of task 'b' keeps no copy of its probe in the workspace (it was made "
        "before colonnade kept every probe), and a path written in the manifest is never "
        "read; pass --task b --probe FILE --probe-labels LABELS.npy with the probe it was "
        "sealed on"]
    # no existence oracle: the same words whether the named file exists or not
    assert all(tasks == first for tasks in outputs.values())


def test_an_old_seal_checks_with_the_probe_the_user_names(made, tmp_path, capsys):
    ws = _old_style(made, tmp_path, "old", {"path": "../data/probe_folder"}, task="a")
    report = check_workspace(ws)
    assert {t.task: t.verdict for t in report.tasks} == {"a": "unverified", "b": "exact"}
    assert main(["check", str(ws), "--task", "a", "--probe",
                 str(made["aside"] / "probe_folder")]) == 0
    assert "all 1 sealed task(s) check exact" in capsys.readouterr().out


@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_an_older_seal_that_kept_its_single_file_byte_for_byte_still_checks(made, tmp_path,
                                                                          suffix):
    """Seals made before every probe was packed kept a one-file probe as it was
    (``probe-<sha256 of the file>.<ext>``); check reads those from the loaded bytes too."""
    ws = _copy(made, tmp_path)
    net = store.load(ws)
    entry = guard.latest_seal(net, "a")
    with np.load(io.BytesIO(net.kept_files[entry["probe"]["file"]])) as z:
        x, y = z["x"], z["y"]
    if suffix == ".npz":
        buffer = io.BytesIO()
        np.savez(buffer, x=x, y=y)
        data = buffer.getvalue()
    else:  # float32 -> repr of its float64 value -> float32 is exact (IEEE 754)
        lines = [",".join([f"f{i}" for i in range(64)] + ["label"])]
        lines += [",".join([repr(float(v)) for v in row.reshape(-1)] + [str(label)])
                  for row, label in zip(x, y, strict=True)]
        data = ("\n".join(lines) + "\n").encode()
    digest = hashlib.sha256(data).hexdigest()
    name = f"probe-{digest}{suffix}"
    net.kept_files[name] = data
    entry["probe"] = {"file": name, "source": f"../a_probe{suffix}", "sha256": digest,
                      "samples": int(len(y))}
    entry["entry_sha256"] = seal.entry_digest(entry)
    store.save(net, ws)
    _exact(check_workspace(ws))


# ----------------------------------------------------------------------------- report
def test_short_names_keep_the_digest_prefix():
    name = "probe-" + "0123456789abcdef" * 4 + ".npz"
    assert short_name(name) == "probe-0123456789ab\u2026.npz"
    assert short_name("weights.safetensors") == "weights.safetensors"


def test_a_probe_too_large_to_keep_is_pinned_and_checked_with_the_file(made, tmp_path,
                                                                       monkeypatch, capsys):
    """The store holds every workspace file in memory, so a probe beyond the limit is not
    kept (a probe larger than memory is still sealed, read in batches)."""
    ws = _copy(made, tmp_path)
    monkeypatch.setattr("colonnade.evidence.kept_probe.KEEP_LIMIT_BYTES", 1000)
    before = set(store.load(ws).kept_files)
    assert main(["seal", str(ws), "--task", "a", "--probe",
                 str(made["aside"] / "probe_folder"), "--reason", "sealed again"]) == 0
    assert "the probe is not kept in the workspace (its 160 samples" in capsys.readouterr().out
    entry = guard.latest_seal(store.load(ws), "a")
    assert "file" not in entry["probe"] and set(store.load(ws).kept_files) == before
    # 160 samples of 1 x 8 x 8 float32 (numel x 4 bytes): 40,960 bytes, shown in MiB
    assert entry["probe"]["not_kept"].startswith("its 160 samples take 0 MiB decoded")
    report = check_workspace(ws)
    by = {t.task: t for t in report.tasks}
    assert by["a"].verdict == "unverified" and by["b"].verdict == "exact"
    assert "more than the 0 MiB a workspace keeps" in by["a"].failures[0]
    given = check_workspace(ws, task="a", probe=made["aside"] / "probe_folder")
    assert [t.verdict for t in given.tasks] == ["exact"]
