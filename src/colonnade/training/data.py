"""Task data from .npz or .csv files, checked before any training starts.

A bad file must fail before the workspace is touched, with one sentence that names the
file and the problem, so every check happens here, at load.
"""

from __future__ import annotations

import csv
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from ..errors import DataError

__all__ = ["TaskData", "load_arrays", "load_task_data", "stratified_split"]


@dataclass
class TaskData:
    """Training and validation tensors of one task."""

    x: torch.Tensor
    y: torch.Tensor
    x_val: torch.Tensor
    y_val: torch.Tensor
    classes: int
    source: str

    @property
    def n_train(self) -> int:
        return int(self.x.shape[0])

    @property
    def n_val(self) -> int:
        return int(self.x_val.shape[0])


def _read_npz(path: Path) -> dict[str, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as f:
            return {k: f[k] for k in f.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise DataError(f"{path}: cannot read as .npz ({exc.__class__.__name__}); write it "
                        f"with numpy.savez(x=..., y=...)") from None


def _read_csv(path: Path) -> dict[str, np.ndarray]:
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: cannot read as CSV ({exc.__class__.__name__})") from None
    rows = [r for r in rows if r]
    if not rows:
        raise DataError(f"{path}: the file is empty; it needs a header with a 'label' column")
    header = [h.strip() for h in rows[0]]
    if "label" not in header:
        raise DataError(f"{path}: no column named 'label' in the header")
    if len(rows) < 2:
        raise DataError(f"{path}: the file holds a header but no rows")
    li = header.index("label")
    labels, feats = [], []
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise DataError(f"{path}: line {n} has {len(row)} fields, the header {len(header)}")
        try:
            values = [float(v) for v in row]
        except ValueError:
            raise DataError(f"{path}: line {n} holds a value that is not a number") from None
        labels.append(values[li])
        feats.append(values[:li] + values[li + 1:])
    return {"x": np.asarray(feats, dtype=np.float32), "y": np.asarray(labels)}


def load_arrays(path: str | Path) -> dict[str, np.ndarray]:
    """Raw arrays of a data file: ``x``, ``y`` and optionally ``x_val``, ``y_val``."""
    path = Path(path)
    if not path.exists():
        raise DataError(f"{path}: no such data file")
    if path.is_dir():
        raise DataError(f"{path}: is a folder; give a .npz or .csv file")
    suffix = path.suffix.lower()
    if suffix == ".npz":
        return _read_npz(path)
    if suffix == ".csv":
        return _read_csv(path)
    raise DataError(f"{path}: unknown data format {suffix or '(none)'}; use .npz or .csv")


def _labels(path: Path, name: str, y: np.ndarray) -> np.ndarray:
    if y.ndim != 1:
        raise DataError(f"{path}: {name} must be one label per sample, got shape {list(y.shape)}")
    if y.dtype.kind == "f":
        if not np.all(np.isfinite(y)) or not np.all(y == np.round(y)):
            raise DataError(f"{path}: {name} must hold whole-number class labels")
    elif y.dtype.kind not in "iu":
        raise DataError(f"{path}: {name} must hold integer class labels, got {y.dtype}")
    if y.size and y.min() < 0:
        raise DataError(f"{path}: {name} holds negative labels (the smallest is "
                        f"{int(y.min())}); class labels run from 0 to C-1")
    return y.astype(np.int64)


def _features(path: Path, name: str, x: np.ndarray, input_shape: tuple[int, ...]) -> np.ndarray:
    if x.dtype.kind not in "fiub":
        raise DataError(f"{path}: {name} must be numeric, got {x.dtype}")
    if x.ndim >= 1 and x.shape[0] == 0:
        raise DataError(f"{path}: {name} holds no samples")
    if tuple(x.shape[1:]) != tuple(input_shape):
        if x.ndim >= 2 and int(np.prod(x.shape[1:])) == int(np.prod(input_shape)):
            x = x.reshape((x.shape[0], *input_shape))  # flat rows of a shaped input (CSV)
        else:
            raise DataError(f"{path}: {name} has sample shape {list(x.shape[1:])}, but the "
                            f"spec's input is {list(input_shape)}")
    x = x.astype(np.float32)
    if not np.all(np.isfinite(x)):
        bad = int(np.count_nonzero(~np.isfinite(x)))
        raise DataError(f"{path}: {name} holds {bad} non-finite values (NaN or inf); clean "
                        f"or drop those samples")
    return x


def _check_pair(path: Path, xn: str, yn: str, x: np.ndarray, y: np.ndarray, classes: int,
                ) -> None:
    if x.shape[0] != y.shape[0]:
        raise DataError(f"{path}: {xn} has {x.shape[0]} samples but {yn} has {y.shape[0]} "
                        f"labels")
    if y.size and (y.min() < 0 or y.max() >= classes):
        raise DataError(f"{path}: {yn} holds labels from {int(y.min())} to {int(y.max())}, "
                        f"outside 0..{classes - 1} for a task of {classes} classes")


def stratified_split(y: np.ndarray, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Train and validation indices with each class split in the same proportion."""
    rng = np.random.default_rng(seed)
    train, val = [], []
    for c in np.unique(y):
        idx = np.flatnonzero(y == c)
        rng.shuffle(idx)
        n_val = int(round(len(idx) * fraction))
        if len(idx) >= 2:
            n_val = min(max(n_val, 1), len(idx) - 1)
        else:
            n_val = 0
        val.append(idx[:n_val])
        train.append(idx[n_val:])
    return np.sort(np.concatenate(train)), np.sort(np.concatenate(val))


def load_task_data(path: str | Path, input_shape: tuple[int, ...], classes: int | None = None,
                   val_path: str | Path | None = None, val_fraction: float = 0.2,
                   seed: int = 0, need_labels: bool = True, split: bool = True) -> TaskData:
    """Load and check one task's data; validation from the file, ``val_path`` or a split.

    ``classes`` is the task's class count when known (a grown task, or ``--classes``);
    otherwise it is taken from the largest label. ``split=False`` keeps every sample, in
    file order, as ``x``/``y`` (for prediction and probes).
    """
    path = Path(path)
    arrays = load_arrays(path)
    if "x" not in arrays:
        raise DataError(f"{path}: no array named 'x' (found: {', '.join(arrays) or 'none'})")
    x = _features(path, "x", arrays["x"], input_shape)
    if "y" not in arrays:
        if need_labels:
            raise DataError(f"{path}: no array named 'y' with the labels")
        empty = torch.empty(0, dtype=torch.int64)
        return TaskData(torch.from_numpy(x), empty, torch.from_numpy(x[:0]), empty,
                        classes or 0, str(path))
    y = _labels(path, "y", arrays["y"])
    if classes is None:
        classes = int(y.max()) + 1 if y.size else 0
        if classes < 2:
            raise DataError(f"{path}: y holds a single class; a task needs at least 2")
    _check_pair(path, "x", "y", x, y, classes)
    if not split:
        return TaskData(torch.from_numpy(np.ascontiguousarray(x)), torch.from_numpy(y),
                        torch.from_numpy(x[:0]), torch.from_numpy(y[:0]), classes, str(path))
    if val_path is not None:
        val_path = Path(val_path)
        va = load_arrays(val_path)
        if "x" not in va or "y" not in va:
            raise DataError(f"{val_path}: a validation file needs arrays 'x' and 'y'")
        x_val = _features(val_path, "x", va["x"], input_shape)
        y_val = _labels(val_path, "y", va["y"])
        _check_pair(val_path, "x", "y", x_val, y_val, classes)
    elif "x_val" in arrays or "y_val" in arrays:
        if "x_val" not in arrays or "y_val" not in arrays:
            raise DataError(f"{path}: give both x_val and y_val, or neither")
        x_val = _features(path, "x_val", arrays["x_val"], input_shape)
        y_val = _labels(path, "y_val", arrays["y_val"])
        _check_pair(path, "x_val", "y_val", x_val, y_val, classes)
    else:
        tr, va_idx = stratified_split(y, val_fraction, seed)
        if len(va_idx) == 0 or len(tr) == 0:
            raise DataError(f"{path}: too few samples ({len(y)}) to split off validation data; "
                            f"add samples or give --val")
        x, x_val, y, y_val = x[tr], x[va_idx], y[tr], y[va_idx]
    return TaskData(torch.from_numpy(np.ascontiguousarray(x)), torch.from_numpy(y),
                    torch.from_numpy(np.ascontiguousarray(x_val)), torch.from_numpy(y_val),
                    classes, str(path))
