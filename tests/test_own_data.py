"""Data of the user's own: odd but valid files read as documented, bad ones named.

References, each named beside its check: Pillow's own reading of a 16-bit greyscale PNG
(its pixel values, scaled by numpy by the documented 65535); the operating system's own
bytes of a file name (``os.fsencode``) for names that are not UTF-8; ``hashlib`` for the
documented folder digest; the file system's own view of a link (``os.readlink``).
Every refusal is one sentence, a non-zero exit and a workspace left byte for byte.
"""

from __future__ import annotations

import csv
import hashlib
import os

import numpy as np
import pytest
import torch
import yaml
from conftest import snapshot
from PIL import Image

from colonnade.cli import main
from colonnade.errors import DataError
from colonnade.training.data import load_task_data
from colonnade.training.sources import source_digest

SPEC = {"input": [3, 8, 8],
        "column": [{"conv2d": 4, "kernel": 3, "padding": 1}, {"act": "relu"},
                   {"pool": "global_avg"}, {"dense": 4}],
        "train": {"epochs": 1, "batch_size": 8}}


def run(*argv):
    return main([str(a) for a in argv])


def _folder(root, per_class: int = 3):
    rng = np.random.default_rng(0)
    for c in ("a", "b"):
        (root / c).mkdir(parents=True)
        for i in range(per_class):
            Image.fromarray(rng.integers(0, 256, (8, 8, 3), dtype=np.uint8)).save(
                root / c / f"{i}.png")
    return root


@pytest.fixture
def ws(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(SPEC))
    assert run("new", spec, "-o", tmp_path / "ws") == 0
    return tmp_path / "ws"


def test_sixteen_bit_greyscale_fills_every_channel_of_an_rgb_or_rgba_spec(tmp_path):
    root = _folder(tmp_path / "imgs")
    grey = np.random.default_rng(1).integers(256, 65536, (8, 8), dtype=np.uint16)
    path = root / "a" / "deep.png"
    Image.fromarray(grey).save(path)
    with Image.open(path) as img:  # Pillow's own reading of the file
        assert img.mode.startswith("I")
        stored = np.asarray(img).astype(np.float32)
    want = stored / np.float32(65535)
    order = sorted(os.listdir(root / "a")).index("deep.png")
    for channels in (1, 3, 4):
        x = load_task_data(root, (channels, 8, 8), split=False).x.numpy()[order]
        for c in range(min(channels, 3)):  # before: 1.0 everywhere (clipped to white)
            assert np.array_equal(x[c], want), channels
        if channels == 4:
            assert np.all(x[3] == 1.0)  # opaque, as Pillow's L -> RGBA makes it


@pytest.mark.parametrize("kind", ["loop", "dangling"])
def test_a_link_to_no_file_is_named_not_silently_left_out(tmp_path, ws, capsys, kind):
    root = _folder(tmp_path / "imgs")
    bad = root / "a" / "3.png"
    if kind == "loop":
        os.symlink("4.png", bad)
        os.symlink("3.png", root / "a" / "4.png")
    else:
        os.symlink("nowhere.png", bad)
    assert os.readlink(bad)  # the file system's own view: a link
    before = snapshot(ws)
    # before: training went on with the link left out, and said nothing
    assert run("grow", ws, "--task", "t", "--train", root, "--quiet") == 2
    err = capsys.readouterr().err.strip()
    assert str(bad) in err and "symbolic link that leads to no file" in err
    assert len(err.splitlines()) == 1 and snapshot(ws) == before
    assert run("grow", ws, "--task", "t", "--train", root, "--quiet", "--skip-bad") == 0
    assert "skipped" in capsys.readouterr().out


def test_a_file_name_that_is_not_utf8_digests_trains_and_predicts(tmp_path, ws, capsys):
    root = _folder(tmp_path / "imgs")
    raw = os.fsencode(root / "a") + b"/caf\xe9.png"  # Latin-1, as an old camera names it
    with open(raw, "wb") as f:
        f.write((root / "a" / "0.png").read_bytes())
    # The documented digest: relative name, NUL, the file's SHA-256, newline; sorted.
    whole = hashlib.sha256()
    for rel in sorted(os.fsdecode(p) for p in [b"a/caf\xe9.png"] + [
            f"{c}/{i}.png".encode() for c in "ab" for i in range(3)]):
        whole.update(os.fsencode(rel) + b"\0" + hashlib.sha256(
            (root / rel).read_bytes()).hexdigest().encode() + b"\n")
    assert source_digest(root) == whole.hexdigest()  # before: UnicodeEncodeError
    assert run("grow", ws, "--task", "t", "--train", root, "--quiet") == 0
    out = tmp_path / "p.csv"
    assert run("predict", ws, "--task", "t", "--data", root / "a", "-o", out) == 0
    with open(out, newline="", encoding="utf-8", errors="surrogateescape") as f:
        ids = [row["id"] for row in csv.DictReader(f)]
    assert os.fsencode(ids[-1]) == b"caf\xe9.png"  # the name's own bytes


def test_a_class_folder_name_that_is_not_utf8_is_refused_before_the_commit(tmp_path, ws,
                                                                          capsys):
    root = _folder(tmp_path / "imgs")
    os.rename(root / "b", os.fsencode(root) + b"/\xff\xfe")
    before = snapshot(ws)
    # before: the commit wrote a manifest no YAML reader accepts; the workspace was lost
    assert run("grow", ws, "--task", "t", "--train", root, "--quiet") == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "not valid UTF-8" in err and "\\xff\\xfe" in err
    assert snapshot(ws) == before
    assert run("show", ws) == 0


def test_a_float_wav_holding_nan_is_named_and_can_be_skipped(tmp_path, capsys):
    import soundfile

    rng = np.random.default_rng(2)
    for c in ("a", "b"):
        (tmp_path / "w" / c).mkdir(parents=True)
        for i in range(3):
            soundfile.write(tmp_path / "w" / c / f"{i}.wav",
                            rng.uniform(-1, 1, 400).astype(np.float32), 8000, subtype="FLOAT")
    wave = rng.uniform(-1, 1, 400).astype(np.float32)
    wave[7] = np.nan
    bad = tmp_path / "w" / "a" / "nan.wav"
    soundfile.write(bad, wave, 8000, subtype="FLOAT")
    assert np.isnan(soundfile.read(bad, dtype="float32")[0][7])  # soundfile's own reading
    # before: "w: x[3]: holds 1 non-finite value(s)": the folder, not the file, and
    # --skip-bad could not leave it out
    with pytest.raises(DataError, match=r"nan\.wav: holds 1 non-finite sample"):
        load_task_data(tmp_path / "w", (1, 400))
    data = load_task_data(tmp_path / "w", (1, 400), skip_bad=True, split=False)
    assert len(data.x) == 6 and bool(torch.isfinite(data.x).all())


def test_only_verbs_that_have_skip_bad_suggest_it(tmp_path, ws, capsys):
    root = _folder(tmp_path / "imgs", per_class=8)
    assert run("grow", ws, "--task", "t", "--train", root, "--quiet") == 0
    bad = root / "a" / "junk.png"
    bad.write_bytes(b"junk")
    capsys.readouterr()
    for argv, offered in ((["grow", ws, "--task", "u", "--train", root, "--quiet"], True),
                          (["predict", ws, "--task", "t", "--data", root, "-o",
                            tmp_path / "p.csv"], True),
                          (["seal", ws, "--task", "t", "--probe", root], False),
                          (["usage", ws, "--task", "t", "--data", root], False),
                          (["export", ws, "--task", "t", "-o", tmp_path / "t.onnx", "--int8",
                            "--calibrate", root], False)):
        assert run(*argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert err[-1].startswith("colonnade: error: ") and str(bad) in err[-1], err
        # before: every verb said "pass --skip-bad", which seal, usage and export refuse
        assert ("--skip-bad" in err[-1]) == offered, argv[0]
        if offered:  # the flag the sentence names is that verb's, and does what it says
            assert run(*argv, "--skip-bad") == 0, argv[0]
