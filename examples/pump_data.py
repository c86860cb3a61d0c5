"""Synthetic vibration spectra for an invented fleet of pumps (demo data only).

Everything here is made up: the pump models, their speeds and the fault sizes.
The fault shapes follow common-practice rules of thumb of vibration analysis so
that the demo tasks look plausible, not to model any real machine.

    python examples/pump_data.py --out DIR [--train N] [--probe N] [--seed S] [--folders]

With ``--folders`` every task is also written as class folders, one ``.npy`` file per
spectrum: ``DIR/<task>/<class>/<n>.npy`` (training) and ``DIR/<task>_probe/...``, which
colonnade reads with its folder reader (class names from the folder names).
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import zlib

import numpy as np

N_BINS = 128
F_MAX = 1000.0  # Hz; bins are centred at k * DF, k = 0..127
DF = F_MAX / N_BINS  # 7.8125 Hz per bin
FREQS = np.arange(N_BINS) * DF

# Invented pump models. bearing_ratio is the outer-race defect frequency as a
# multiple of running speed; common practice: roughly 0.4 x number of rolling
# elements, so ~3-5x and never a whole number (values here are invented).
MODELS = {
    "A": {"rpm": 1480.0, "vanes": 6, "bearing_ratio": 3.58},
    "B": {"rpm": 2950.0, "vanes": 5, "bearing_ratio": 3.47},
}

_FAULTS = ["healthy", "imbalance", "misalignment", "bearing_wear"]
TASKS = {
    "pump_a_faults": {
        "model": "A",
        "description": "Pump model A (~1480 rpm): healthy or one mechanical fault.",
        "classes": list(_FAULTS),
    },
    "pump_b_faults": {
        "model": "B",
        "description": "Pump model B (~2950 rpm): healthy or one mechanical fault.",
        "classes": list(_FAULTS),
    },
    "pump_a_cavitation": {
        "model": "A",
        "description": "Pump model A: cavitating or not; both classes carry random mild faults.",
        "classes": ["no_cavitation", "cavitation"],
    },
}


def running_hz(rpm: float) -> float:
    """Running speed in Hz from rpm (frequency = rpm / 60)."""
    return rpm / 60.0


def freq_bin(hz: float) -> int:
    """Index of the bin whose centre is nearest to hz."""
    return int(round(hz / DF))


def _lines(rng, f, amp) -> np.ndarray:
    """Render peaks f [n, L] (Hz) with amplitudes amp [n, L] as leaky lines.

    A windowed FFT smears a tone over about one bin each side (common practice
    for a Hann window); a Gaussian of 0.6 bins stands in for that.
    """
    d = (FREQS[None, None, :] - f[:, :, None]) / (0.6 * DF)
    return (amp[:, :, None] * np.exp(-0.5 * d * d)).sum(axis=1)


def _spectra(rng, model: str, sev: dict[str, np.ndarray]) -> np.ndarray:
    """Amplitude spectra (mm/s, invented scale) for per-sample fault severities.

    sev maps imbalance / misalignment / bearing / cavitation to arrays in [0, 1].
    """
    m = MODELS[model]
    n = len(sev["imbalance"])
    # Running speed wanders a little with load and supply (invented: ~1 %).
    f1 = running_hz(m["rpm"]) * (1.0 + 0.01 * rng.standard_normal(n))
    one = lambda lo, hi: rng.uniform(lo, hi, n)  # noqa: E731

    # Healthy machine: residual 1x, small 2x/3x, blade-pass tone at vanes x 1x.
    a1 = 0.6 * rng.lognormal(0.0, 0.3, n)
    a2 = 0.15 * rng.lognormal(0.0, 0.4, n)
    a3 = 0.05 * rng.lognormal(0.0, 0.4, n)
    bpf = 0.3 * rng.lognormal(0.0, 0.4, n)
    # Imbalance: 1x grows (common practice: radial 1x dominates).
    a1 = a1 * (1.0 + 5.0 * sev["imbalance"])
    # Misalignment: 2x strong, often above 1x, with some 1x and 3x (common practice).
    mis = sev["misalignment"]
    a2 = a2 + 1.8 * mis * rng.lognormal(0.0, 0.2, n)
    a3 = a3 + 0.6 * mis * rng.lognormal(0.0, 0.3, n)
    a1 = a1 * (1.0 + 0.5 * mis)
    freqs = [f1, 2 * f1, 3 * f1, m["vanes"] * f1]
    amps = [a1, a2, a3, bpf]
    # Bearing wear: non-synchronous defect tone, its harmonics and +/-1x
    # sidebands (common practice for outer-race defects), plus raised HF floor.
    brg = sev["bearing"]
    fb = m["bearing_ratio"] * f1
    for h, scale in ((1, 0.7), (2, 0.45), (3, 0.3)):
        amps.append(scale * brg * rng.lognormal(0.0, 0.3, n))
        freqs.append(h * fb)
        for side in (-1.0, 1.0):
            amps.append(0.35 * scale * brg * rng.lognormal(0.0, 0.3, n))
            freqs.append(h * fb + side * f1)
    spec = _lines(rng, np.stack(freqs, 1), np.stack(amps, 1))

    # Noise floor: higher at low frequency, random level and tilt per sample;
    # per-bin scatter is Rayleigh, as for the magnitude of a noisy FFT bin.
    level = 0.02 * rng.lognormal(0.0, 0.3, n)[:, None]
    tilt = one(0.5, 3.0)[:, None]
    floor = level * (1.0 + tilt * np.exp(-FREQS[None, :] / 120.0))
    hf = np.clip((FREQS - 500.0) / 300.0, 0.0, 1.0)[None, :]  # bearing resonance band
    floor = floor + 0.05 * brg[:, None] * hf
    # Cavitation: broadband, random, non-periodic energy in the upper band
    # (common practice: cavitation shows as a raised HF "haystack").
    cav = sev["cavitation"][:, None]
    centre = one(450.0, 750.0)[:, None]
    width = one(120.0, 250.0)[:, None]
    hump = np.exp(-0.5 * ((FREQS[None, :] - centre) / width) ** 2)
    floor = floor + 0.08 * cav * hump * rng.lognormal(0.0, 0.5, (n, N_BINS))
    spec = spec + floor * rng.rayleigh(1.0, (n, N_BINS))
    # Sensor gain varies with mounting and calibration (invented: ~25 %).
    return spec * rng.lognormal(0.0, 0.25, n)[:, None]


def _severities(rng, name: str, y: np.ndarray) -> dict[str, np.ndarray]:
    """Per-sample fault severities in [0, 1] for a task's labels."""
    n = len(y)
    sev = {k: np.zeros(n) for k in ("imbalance", "misalignment", "bearing", "cavitation")}
    if name == "pump_a_cavitation":
        sev["cavitation"] = np.where(y == 1, rng.uniform(0.1, 1.0, n), 0.0)
        # Both classes carry random mild mechanical faults as distractors.
        for k in ("imbalance", "misalignment", "bearing"):
            on = rng.random(n) < 0.3
            sev[k] = np.where(on, rng.uniform(0.05, 0.5, n), 0.0)
        return sev
    for label, k in ((1, "imbalance"), (2, "misalignment"), (3, "bearing")):
        sev[k] = np.where(y == label, rng.uniform(0.2, 1.0, n), 0.0)
    return sev


def _to_features(spec: np.ndarray) -> np.ndarray:
    """Log-scale amplitudes so peaks and floor share one range, centred near 0."""
    return (np.log10(spec + 1e-4) + 1.5).astype(np.float32)


def make_task(name: str, n: int, seed: int, stream: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Return x float32 [n, 128] and balanced labels y int64 [n] for a task.

    The same (name, n, seed, stream) always gives the same arrays; a different
    stream gives an independent sample, used for probe files.
    """
    if name not in TASKS:
        raise ValueError(f"unknown task {name!r}; known tasks: {', '.join(TASKS)}")
    k = len(TASKS[name]["classes"])
    if int(n) != n or n < k:
        raise ValueError(f"n must be an integer of at least {k} for task {name!r}")
    ss = np.random.SeedSequence([int(seed), zlib.crc32(name.encode()), int(stream)])
    rng = np.random.default_rng(ss)
    y = rng.permutation(np.arange(int(n)) % k).astype(np.int64)
    spec = _spectra(rng, TASKS[name]["model"], _severities(rng, name, y))
    return _to_features(spec), y


def _atomic_savez(path: str, **arrays) -> None:
    """Write an .npz so a reader never sees a half-written file."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix="." + os.path.basename(path), suffix=".tmp")
    try:
        if hasattr(os, "fchmod"):  # mkstemp makes 0600; give the usual mode
            mask = os.umask(0)
            os.umask(mask)
            os.fchmod(fd, 0o666 & ~mask)
        with os.fdopen(fd, "wb") as f:  # a file object stops savez appending ".npz"
            np.savez(f, **arrays)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    if hasattr(os, "O_DIRECTORY"):  # make the rename itself durable (POSIX)
        dfd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)


def write_task_files(out_dir: str, name: str, n_train: int, n_probe: int, seed: int) -> dict:
    """Write <out>/<name>.npz (training) and <out>/<name>_probe.npz (probe).

    The probe set comes from a separate seed stream, so it is disjoint from the
    training set and can be used to seal a trained column.
    """
    os.makedirs(out_dir, exist_ok=True)
    paths = {}
    for kind, n, stream, suffix in (("train", n_train, 0, ""), ("probe", n_probe, 1, "_probe")):
        x, y = make_task(name, n, seed, stream=stream)
        path = os.path.join(out_dir, f"{name}{suffix}.npz")
        _atomic_savez(path, x=x, y=y)
        paths[kind] = path
    return paths


def write_task_folders(out_dir: str, name: str, n_train: int, n_probe: int, seed: int) -> dict:
    """Write the same samples as ``write_task_files`` as class folders of .npy files.

    ``<out>/<name>/<class>/<n>.npy`` for training and ``<out>/<name>_probe/...`` for the
    probe; each folder is built under a temporary name and renamed when complete.
    """
    paths = {}
    classes = TASKS[name]["classes"]
    for kind, n, stream, suffix in (("train", n_train, 0, ""), ("probe", n_probe, 1, "_probe")):
        x, y = make_task(name, n, seed, stream=stream)
        final = os.path.join(out_dir, f"{name}{suffix}")
        tmp = tempfile.mkdtemp(dir=out_dir, prefix=f".{name}{suffix}.")
        try:
            for c in classes:
                os.makedirs(os.path.join(tmp, c))
            for i, (row, label) in enumerate(zip(x, y, strict=True)):
                np.save(os.path.join(tmp, classes[label], f"{i:05d}.npy"), row)
            if os.path.isdir(final):
                shutil.rmtree(final)
            os.replace(tmp, final)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        paths[kind] = final
    return paths


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one sentence, no usage dump
        sys.stderr.write(f"pump_data: {message}.\n")
        sys.exit(2)


def _count(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        v = 0
    if v < 4:  # the largest task has 4 classes; each class needs one sample
        raise argparse.ArgumentTypeError(f"expected an integer of at least 4, got {text!r}")
    return v


def main(argv=None) -> int:
    p = _Parser(description="Write synthetic pump vibration tasks (invented demo data).")
    p.add_argument("--out", required=True, help="folder to write the .npz files into")
    p.add_argument("--train", type=_count, default=1200, help="training samples per task")
    p.add_argument("--probe", type=_count, default=400, help="probe samples per task")
    p.add_argument("--seed", type=int, default=0, help="seed; same seed, same files")
    p.add_argument("--folders", action="store_true",
                   help="also write each task as class folders of .npy files")
    a = p.parse_args(argv)
    if a.seed < 0:
        p.error(f"--seed must be non-negative, got {a.seed}")
    try:
        for name in TASKS:
            for path in write_task_files(a.out, name, a.train, a.probe, a.seed).values():
                with np.load(path) as z:
                    x, y = z["x"], z["y"]
                counts = " ".join(f"{c}:{k}" for c, k in enumerate(np.bincount(y)))
                print(f"{path} x{list(x.shape)} {x.dtype} classes {counts}")
            if a.folders:
                for path in write_task_folders(a.out, name, a.train, a.probe, a.seed).values():
                    print(f"{path}/ one folder per class, one .npy file per spectrum")
    except OSError as e:
        sys.stderr.write(f"pump_data: cannot write to {a.out!r} ({e.strerror or e}).\n")
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
