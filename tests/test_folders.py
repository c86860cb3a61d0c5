"""Class folders of images, waveforms and .npy files, index files, class names.

Outside references: images are written and re-read with Pillow and the expected values
computed with numpy from the pixels Pillow stored; waveforms are written with soundfile
(libsndfile) and its own read-back is the reference; the digits are scikit-learn's
bundled copy of the UCI handwritten digits.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import soundfile
import torch
import yaml
from conftest import snapshot
from PIL import Image

from colonnade.cli import main
from colonnade.errors import DataError
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.data import load_task_data
from colonnade.training.growth import grow

IMAGE_SPEC = {
    "name": "digits-images",
    "input": [1, 8, 8],
    "column": [{"flatten": True}, {"dense": 32}, {"act": "relu"}],
    "lateral": {"kind": "linear"},
    "train": {"epochs": 5, "batch_size": 32, "lr": 0.01, "patience": 0, "seed": 0},
}


def run(*argv):
    return main([str(a) for a in argv])


def _digits():
    from sklearn.datasets import load_digits

    d = load_digits()
    return (d.images * 15).astype(np.uint8), d.target  # 0..16 -> 0..240, exact in uint8


def _digit_folder(root, n=None):
    """The digits as PNG files, one folder per class; returns the pixels in folder order."""
    pixels, target = _digits()
    n = n or len(target)
    for i in range(n):
        os.makedirs(root / str(target[i]), exist_ok=True)
        Image.fromarray(pixels[i], mode="L").save(root / str(target[i]) / f"{i:04d}.png")
    order = sorted(range(n), key=lambda i: (str(target[i]), f"{i:04d}"))
    return pixels[order], target[order]


def test_png_folder_reads_what_pillow_wrote_and_trains_like_the_arrays(tmp_path):
    pixels, target = _digit_folder(tmp_path / "digits", n=600)
    # Reference: the pixels as stored, scaled to [0, 1] by numpy (the documented rule).
    expected = pixels.astype(np.float32)[:, None] / np.float32(255)
    full = load_task_data(tmp_path / "digits", (1, 8, 8), split=False)
    assert torch.equal(full.x, torch.from_numpy(expected))
    assert full.class_names == [str(c) for c in range(10)]
    assert full.y.tolist() == target.tolist()

    np.savez(tmp_path / "digits.npz", x=expected, y=target)
    spec = parse_spec(IMAGE_SPEC)
    logits = {}
    for name, source in (("folder", tmp_path / "digits"), ("arrays", tmp_path / "digits.npz")):
        net = ProgressiveNet(spec)
        grow(net, "digits", load_task_data(source, (1, 8, 8), seed=0), progress=False)
        logits[name] = net(torch.from_numpy(expected), task="digits")
    assert torch.equal(logits["folder"], logits["arrays"])
    accuracy = (logits["folder"].argmax(1).numpy() == target).mean()
    assert accuracy > 0.8  # chance is 0.1; measured here: 0.957 after 5 epochs


def test_rgb_image_is_converted_and_resized_as_pillow_does(tmp_path):
    rng = np.random.default_rng(0)
    for c in ("a", "b"):
        (tmp_path / "rgb" / c).mkdir(parents=True)
        Image.fromarray(rng.integers(0, 256, (16, 12, 3), dtype=np.uint8)).save(
            tmp_path / "rgb" / c / "x.bmp")
    data = load_task_data(tmp_path / "rgb", (1, 8, 6), split=False)
    # Reference: Pillow's own conversion to greyscale and bilinear resize.
    with Image.open(tmp_path / "rgb" / "a" / "x.bmp") as img:
        ref = np.asarray(img.convert("L").resize((6, 8), Image.Resampling.BILINEAR),
                         dtype=np.float32) / np.float32(255)
    assert torch.equal(data.x[0, 0], torch.from_numpy(ref))
    assert "2 image(s) resized to 6x8 (bilinear)" in data.notes


def _wave_folder(root, rate=8000, length=400, subtype="FLOAT", per_class=6):
    rng = np.random.default_rng(0)
    written = {}
    t = np.arange(length) / rate
    for c, freq in (("hum", 50.0), ("whine", 1500.0)):
        (root / c).mkdir(parents=True)
        for i in range(per_class):
            wave = np.stack([np.sin(2 * np.pi * freq * t + i),
                             0.1 * rng.standard_normal(length)], axis=1).astype(np.float32) * 0.5
            path = root / c / f"{i}.wav"
            soundfile.write(path, wave, rate, subtype=subtype)
            written[str(path)] = wave
    return written


def test_wav_folder_reads_back_the_written_samples_bit_for_bit_and_trains(tmp_path):
    written = _wave_folder(tmp_path / "waves")
    data = load_task_data(tmp_path / "waves", (2, 400), split=False)
    for i, path in enumerate(data.ids):
        # Reference: the float32 samples soundfile wrote, as (channels, length).
        assert np.array_equal(data.x[i].numpy(), written[path].T)
    spec = parse_spec({"input": {"shape": [2, 400], "rate": 8000},
                       "column": [{"conv1d": 4, "kernel": 9, "stride": 4}, {"act": "relu"},
                                  {"pool": "global_avg"}, {"flatten": True}, {"dense": 8}],
                       "train": {"epochs": 30, "batch_size": 4, "lr": 0.01, "seed": 0,
                                 "val_fraction": 0.35}})
    net = ProgressiveNet(spec)
    entry = grow(net, "sound", load_task_data(tmp_path / "waves", (2, 400), seed=0),
                 progress=False)
    assert net.task("sound").class_names == ["hum", "whine"]
    assert entry["val_accuracy"] == 1.0  # 50 Hz against 1.5 kHz: separable by design


def test_flac_pcm16_reads_as_soundfile_scales_it_and_is_cut_to_length(tmp_path):
    _wave_folder(tmp_path / "w", subtype="PCM_16", per_class=1)
    for path in (tmp_path / "w").rglob("*.wav"):
        frames, rate = soundfile.read(path, dtype="float32")
        soundfile.write(path.with_suffix(".flac"), frames, rate, subtype="PCM_16")
        path.unlink()
    data = load_task_data(tmp_path / "w", (2, 300), split=False)
    ref, _ = soundfile.read(data.ids[0], dtype="float32", always_2d=True)  # the reference
    assert np.array_equal(data.x[0].numpy(), ref[:300].T)
    assert "2 waveform(s) cut to their first 300 frames" in data.notes
    padded = load_task_data(tmp_path / "w", (2, 500), split=False)
    assert padded.x[0, :, 400:].abs().max() == 0 and "padded" in padded.notes[0]


def test_npy_files_index_csv_and_class_names(tmp_path):
    rng = np.random.default_rng(1)
    (tmp_path / "samples").mkdir()
    rows = ["file,label"]
    for i in range(12):
        np.save(tmp_path / "samples" / f"s{i}.npy", rng.normal(size=(3, 4)))
        rows.append(f"samples/s{i}.npy,{['ok', 'worn', 'cracked'][i % 3]}")
    (tmp_path / "index.csv").write_text("\n".join(rows) + "\n")
    data = load_task_data(tmp_path / "index.csv", (3, 4), split=False)
    assert data.class_names == ["cracked", "ok", "worn"]  # sorted names
    assert data.y.tolist() == [[1, 2, 0][i % 3] for i in range(12)]
    assert "converted float64 values to float32" in data.notes
    # The same index inside a folder, and the task's own order of names.
    os.replace(tmp_path / "index.csv", tmp_path / "samples" / "index.csv")
    (tmp_path / "samples" / "index.csv").write_text(
        "\n".join(r.replace("samples/", "") for r in rows) + "\n")
    data = load_task_data(tmp_path / "samples", (3, 4), split=False,
                          class_names=["ok", "worn", "cracked"])
    assert data.y.tolist() == [i % 3 for i in range(12)]
    with pytest.raises(DataError, match=r"class name\(s\) 'cracked' that the task does not "
                                        r"have \(its classes: ok, worn\)"):
        load_task_data(tmp_path / "samples", (3, 4), classes=2, class_names=["ok", "worn"],
                       split=False)


@pytest.fixture
def image_ws(tmp_path):
    _digit_folder(tmp_path / "digits", n=300)
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(IMAGE_SPEC))
    assert run("new", spec, "-o", tmp_path / "ws") == 0
    return tmp_path


def _truncated_png(path):
    Image.fromarray(np.random.default_rng(0).integers(0, 256, (64, 64), dtype=np.uint8)).save(path)
    path.write_bytes(path.read_bytes()[:300])


def _bad_cases(root):
    """(file to plant, bytes or a writer, words the refusal must hold)."""
    return [
        ("3/corrupt.png", b"\x89PNG\r\n\x1a\n not really", "cannot read it as an image"),
        ("3/empty.jpg", b"", "cannot read it as an image"),
        ("4/notes.txt", b"hello", "unknown sample format .txt"),
        ("4/shape.npy", lambda p: np.save(p, np.zeros((8, 8))), "its shape is [8, 8]"),
        ("5/sound.wav", lambda p: soundfile.write(p, np.zeros(100), 8000),
         "it is a waveform, but the spec's input [1, 8, 8] is not"),
        ("6/truncated.png", _truncated_png, "cannot read it as an image"),
    ]


def test_every_bad_file_is_named_and_the_workspace_stays_byte_identical(image_ws, capsys,
                                                                         monkeypatch):
    from PIL import ImageFile

    # Another library may switch Pillow to accept truncated images process-wide (a PDF
    # engine does): a truncated file must still be refused.
    monkeypatch.setattr(ImageFile, "LOAD_TRUNCATED_IMAGES", True)
    ws = image_ws / "ws"
    before = snapshot(ws)
    for rel, content, words in _bad_cases(image_ws / "digits"):
        path = image_ws / "digits" / rel
        if callable(content):
            content(path)
        else:
            path.write_bytes(content)
        code = run("grow", ws, "--task", "t", "--train", image_ws / "digits", "--quiet")
        err = capsys.readouterr().err.strip()
        assert code != 0 and str(path) in err and words in err, (rel, err)
        assert "Traceback" not in err and len(err.splitlines()) == 1
        assert snapshot(ws) == before
        path.unlink()


def test_skip_bad_lists_and_records_the_bad_files(image_ws, capsys):
    ws = image_ws / "ws"
    (image_ws / "digits" / "3" / "corrupt.png").write_bytes(b"junk")
    (image_ws / "digits" / "4" / "notes.txt").write_bytes(b"hello")
    assert run("grow", ws, "--task", "digits", "--train", image_ws / "digits", "--quiet",
               "--skip-bad") == 0
    out = capsys.readouterr().out
    assert "skipped 2 bad file(s)" in out and "corrupt.png" in out and "notes.txt" in out
    manifest = yaml.safe_load((ws / "manifest.yaml").read_text())
    record = manifest["records"]["digits"]["data"]
    assert record["skipped"] == 2 and record["n_train"] + record["n_val"] == 300
    assert manifest["network"]["tasks"][0]["class_names"] == [str(c) for c in range(10)]


def test_sample_rates_other_than_the_specs_or_the_first_files_are_refused(tmp_path):
    _wave_folder(tmp_path / "w", rate=8000, per_class=2)
    odd = tmp_path / "w" / "hum" / "odd.wav"
    soundfile.write(odd, np.zeros((400, 2), np.float32), 16000, subtype="FLOAT")
    with pytest.raises(DataError, match=r"odd.wav: its sample rate is 16000 Hz, the first "
                                        r"waveform's is 8000 Hz; resample it"):
        load_task_data(tmp_path / "w", (2, 400))
    odd.unlink()
    with pytest.raises(DataError, match=r"its sample rate is 8000 Hz, the spec's input.rate is "
                                        r"44100 Hz"):
        load_task_data(tmp_path / "w", (2, 400), rate=44100)
    mono = tmp_path / "w" / "whine" / "mono.wav"
    soundfile.write(mono, np.zeros(400, np.float32), 8000, subtype="FLOAT")
    with pytest.raises(DataError, match=r"mono.wav: it has 1 channel\(s\), the spec's input 2"):
        load_task_data(tmp_path / "w", (2, 400))


def test_predict_an_unlabelled_folder_of_camera_images(image_ws, capsys):
    import csv

    ws = image_ws / "ws"
    assert run("grow", ws, "--task", "digits", "--train", image_ws / "digits", "--quiet") == 0
    field = image_ws / "field"
    field.mkdir()
    pixels, _ = _digits()
    for i in range(4):  # larger RGB JPEGs from the camera: converted and resized
        Image.fromarray(pixels[400 + i]).convert("RGB").resize((16, 16)).save(
            field / f"cam{i}.jpg")
    capsys.readouterr()
    assert run("predict", ws, "--task", "digits", "--data", field, "-o",
               image_ws / "field.csv") == 0
    assert "accuracy" not in capsys.readouterr().out
    with open(image_ws / "field.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["id"] for r in rows] == [f"cam{i}.jpg" for i in range(4)]
    assert all(r["predicted"] in [str(c) for c in range(10)] for r in rows)
    assert "label" not in rows[0]
