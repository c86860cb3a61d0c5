"""Task data, checked before any training starts: samples, labels and class names.

A bad file must fail before the workspace is touched, with one sentence that names the
file and the problem. Files are read by ``sources`` (which checks the samples); this
module gives the labels their meaning: integers 0..C-1, or class names (from folder
names, from text labels, or given) mapped onto the task's classes, and splits off
validation data. Samples stay where ``sources`` put them: a tensor in memory, or
``Rows`` read on demand for data larger than memory.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset

from ..errors import DataError
from ..model.parts import MAX_CLASSES
from ..model.schema import Spec
from .datasets import DatasetRows, Rows, checked_float32, subset
from .sources import Source, open_source

__all__ = ["TaskData", "load_task_data", "stratified_split", "MAX_CLASSES", "check_class_count",
           "DEFAULT_BUDGET_BYTES", "task_data_from", "load_for_spec"]

DEFAULT_BUDGET_BYTES = 1 << 30  # decoded folder samples kept in memory up to this size


@dataclass
class TaskData:
    """Training and validation samples of one task, in memory or read on demand.

    ``x`` and ``x_val`` are float32 tensors or ``Rows``; both index alike (``x[idx]``).
    ``class_names`` names the classes 0..C-1 when the data or the user named them.
    ``ids`` names each sample of unsplit data (files, or CSV lines) for predictions.
    """

    x: torch.Tensor | Rows
    y: torch.Tensor
    x_val: torch.Tensor | Rows
    y_val: torch.Tensor
    classes: int
    source: str
    class_names: list[str] | None = None
    ids: list[str] | None = None
    notes: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)

    @property
    def n_train(self) -> int:
        return int(self.x.shape[0])

    @property
    def n_val(self) -> int:
        return int(self.x_val.shape[0])

    @property
    def streamed(self) -> bool:
        """Whether the samples are read from disk per batch rather than held in memory."""
        return isinstance(self.x, Rows) or isinstance(self.x_val, Rows)


def check_class_count(classes: int, where: str) -> int:
    """Refuse a class count a head could not sensibly hold, before anything is allocated."""
    if classes > MAX_CLASSES:
        raise DataError(f"{where}: {classes} classes is more than colonnade allows "
                        f"({MAX_CLASSES}); class labels must run 0..C-1, so renumber them or "
                        f"label by name")
    return classes


def _features(where: str, name: str, x: np.ndarray | Rows, shape: tuple[int, ...],
              flat_rows: bool, notes: list[str]) -> torch.Tensor | Rows:
    """Samples of the spec's input shape; only a CSV's flat rows may be reshaped."""
    got = tuple(x.shape[1:]) if x.ndim >= 1 else ()
    if x.shape[0] == 0 if x.ndim >= 1 else True:
        raise DataError(f"{where}: {name} holds no samples")
    if got != tuple(shape):
        size = int(np.prod(shape))
        if flat_rows and len(got) == 1 and got[0] == size:
            x = x.reshape((x.shape[0], *shape))  # a CSV row is flat by nature
        elif flat_rows:
            raise DataError(f"{where}: each row holds {got[0]} values, but the spec's input "
                            f"{list(shape)} needs {size}")
        else:
            raise DataError(f"{where}: {name} has sample shape {list(got)}, but the spec's "
                            f"input is {list(shape)}; store the samples in that shape")
    if isinstance(x, Rows):
        return x

    def row(r: int) -> str:
        return f"{where}: {name}[{r}]"

    return torch.from_numpy(np.ascontiguousarray(checked_float32(x, row, notes)))


def _names(labels: np.ndarray) -> bool:
    return labels.dtype.kind in "USO"


def _integers(where: str, name: str, y: np.ndarray) -> np.ndarray:
    if y.ndim != 1:
        raise DataError(f"{where}: {name} must be one label per sample, got shape "
                        f"{list(y.shape)}")
    if y.dtype.kind == "f":
        if not np.all(np.isfinite(y)) or not np.all(y == np.round(y)):
            raise DataError(f"{where}: {name} must hold whole-number class labels")
    elif y.dtype.kind not in "iub":
        raise DataError(f"{where}: {name} must hold integer class labels or class names, got "
                        f"{y.dtype}")
    if y.size and y.min() < 0:
        raise DataError(f"{where}: {name} holds negative labels (the smallest is "
                        f"{int(y.min())}); class labels run from 0 to C-1")
    if y.size and y.max() >= MAX_CLASSES:
        raise DataError(f"{where}: {name} holds label {int(y.max())}, but labels run 0..C-1 "
                        f"with at most {MAX_CLASSES} classes; renumber them or label the "
                        f"classes by name")
    return y.astype(np.int64)


def _encode(where: str, name: str, y: np.ndarray, known: Sequence[str] | None,
            listed: Sequence[str] | None) -> tuple[np.ndarray, list[str] | None]:
    """Integer labels and the class names they index (None for plain integer classes).

    ``known``: the task's classes, in order (labels by name must be among them). ``listed``:
    every class the source itself lists (a class folder's subfolders), in order.
    """
    if not _names(y):
        return _integers(where, name, y), (list(known) if known is not None else None)
    text = np.asarray([str(v).strip() for v in y.reshape(-1)])
    if y.ndim != 1:
        raise DataError(f"{where}: {name} must be one label per sample, got shape "
                        f"{list(y.shape)}")
    present = sorted(set(text.tolist()))
    if known is None and listed is None and all(v.isdigit() for v in present):
        return _integers(where, name, text.astype(np.int64)), None  # "0", "1", ... folders
    names = list(known) if known is not None else (list(listed) if listed is not None
                                                    else present)
    check_class_count(len(names), where)
    unknown = [v for v in present if v not in set(names)]
    if unknown:
        raise DataError(f"{where}: {name} holds class name(s) {', '.join(map(repr, unknown[:5]))}"
                        f" that the task does not have (its classes: {', '.join(names)})")
    lookup = {n: i for i, n in enumerate(names)}
    return np.asarray([lookup[v] for v in text], dtype=np.int64), names


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


def _class_count(where: str, y: np.ndarray, names: list[str] | None, classes: int | None,
                 name: str = "labels", require_two: bool = True) -> int:
    if names is not None:
        if classes is not None and classes != len(names):
            raise DataError(f"{where}: the data names {len(names)} classes "
                            f"({', '.join(names)}), not {classes}")
        return len(names)
    if classes is None:
        classes = int(y.max()) + 1 if y.size else 0
        if classes < 2 and require_two:
            raise DataError(f"{where}: {name} holds a single class; a task needs at least 2")
    check_class_count(classes, where)
    if y.size and y.max() >= classes:
        raise DataError(f"{where}: labels run from {int(y.min())} to {int(y.max())}, outside "
                        f"0..{classes - 1} for a task of {classes} classes")
    return classes


def _labelled(src: Source, name: str, y_raw: np.ndarray, n: int, known: Sequence[str] | None,
              xname: str = "x") -> tuple[np.ndarray, list[str] | None]:
    y, names = _encode(src.path, name, np.asarray(y_raw), known, src.class_names)
    if y.shape[0] != n:
        raise DataError(f"{src.path}: {xname} has {n} samples but {name} has {y.shape[0]} "
                        f"labels; give one label per sample")
    return y, names


def load_task_data(path: str | Path, input_shape: tuple[int, ...], classes: int | None = None,
                   val_path: str | Path | None = None, val_fraction: float = 0.2,
                   seed: int = 0, need_labels: bool = True, split: bool = True,
                   class_names: Sequence[str] | None = None, labels: str | Path | None = None,
                   skip_bad: bool | None = None, rate: int | None = None,
                   budget_bytes: int = DEFAULT_BUDGET_BYTES, content: bytes | None = None,
                   ) -> TaskData:
    """Load and check one task's data; validation from the file, ``val_path`` or a split.

    ``path`` is an .npz, a .csv (feature rows, or an index of files), a .npy of samples
    with ``labels`` a .npy of labels, or a folder (one subfolder per class, or an
    index.csv; only files for unlabelled data). ``classes`` is the task's class count when
    known; otherwise it comes from the labels. ``class_names`` are the task's classes in
    order: labels by name are mapped onto them (a name the task lacks is refused).
    ``split=False`` keeps every sample, in file order, as ``x``/``y`` (prediction, probes).
    ``rate`` is the spec's waveform sample rate, ``budget_bytes`` how much decoded folder
    data may stay in memory. ``content``: the bytes of an .npz or CSV already in memory,
    which ``path`` only names (nothing is opened). ``skip_bad``: True leaves unreadable
    files of a folder out; False refuses them and suggests ``--skip-bad``; None (verbs
    without that option: seal, check, usage, trim, export, retrain) refuses them without
    suggesting an option the verb does not have.
    """
    if classes is not None:
        check_class_count(classes, str(path))
    if class_names is not None and classes is not None and len(class_names) != classes:
        raise DataError(f"{len(class_names)} class names given for {classes} classes; give "
                        f"one name per class")
    shape = tuple(input_shape)
    src = open_source(path, shape, labels=labels, need_labels=need_labels, skip_bad=skip_bad,
                      rate=rate, budget_bytes=budget_bytes, content=content)
    notes = list(src.notes)
    x = _features(src.path, "x", src.x, shape, src.flat_rows, notes)
    n = int(x.shape[0])

    def done(x, y, x_val, y_val, classes, names, ids=None) -> TaskData:
        return TaskData(x, torch.from_numpy(y), x_val, torch.from_numpy(y_val), classes,
                        src.path, names, ids, notes, src.skipped)

    if src.y is None:
        empty = np.empty(0, dtype=np.int64)
        return done(x, empty, x[:0], empty, classes or len(class_names or ()) or 0,
                    list(class_names) if class_names is not None else None, src.ids)
    y, names = _labelled(src, src.label_name, src.y, n, class_names)
    classes = _class_count(src.path, y, names, classes, src.label_name,
                           require_two=split or need_labels)
    if not split:
        return done(x, y, x[:0], y[:0], classes, names, src.ids)
    if val_path is not None:
        val = open_source(val_path, shape, need_labels=True, skip_bad=skip_bad, rate=rate,
                          budget_bytes=budget_bytes)
        x_val = _features(val.path, "x", val.x, shape, val.flat_rows, notes)
        y_val, _ = _labelled(val, val.label_name, val.y, int(x_val.shape[0]), names or None)
        if names is None and _names(np.asarray(val.y)):
            raise DataError(f"{val.path}: labels classes by name, but the training data by "
                            f"number; label both the same way")
        _class_count(val.path, y_val, names, classes)
    elif src.x_val is not None:
        x_val = _features(src.path, "x_val", src.x_val, shape, src.flat_rows, notes)
        y_val, _ = _labelled(src, "y_val", src.y_val, int(x_val.shape[0]), names, "x_val")
        _class_count(src.path, y_val, names, classes)
    else:
        tr, va = stratified_split(y, val_fraction, seed)
        if len(va) == 0 or len(tr) == 0:
            raise DataError(f"{src.path}: too few samples ({len(y)}) to split off validation "
                            f"data; add samples or give --val")
        x, x_val, y, y_val = subset(x, tr), subset(x, va), y[tr], y[va]
    return done(x, y, x_val, y_val, classes, names)


def load_for_spec(path: str | Path, spec: Spec, **kw: Any) -> TaskData:
    """``load_task_data`` with what the spec fixes: the input shape, the waveform sample
    rate, the validation split and seed, and the memory budget for decoded folders (the
    spec's ``train.cache_mb``, which bounds the data in memory and the cache together)."""
    options: dict[str, Any] = {"rate": spec.input_rate,
                               "val_fraction": spec.train.val_fraction,
                               "seed": spec.train.seed,
                               "budget_bytes": int(spec.train.cache_mb * (1 << 20))}
    options.update(kw)
    return load_task_data(path, tuple(spec.input), **options)


def task_data_from(data: object, input_shape: tuple[int, ...], classes: int | None = None,
                   val_fraction: float = 0.2, seed: int = 0,
                   class_names: Sequence[str] | None = None) -> TaskData:
    """``TaskData`` from what a Python user has: arrays, a torch Dataset or a DataLoader.

    Accepts ``TaskData`` as is; ``(x, y)`` arrays or tensors (held in memory); a map-style
    ``Dataset`` of ``(x, y)`` pairs, read per sample on demand; or a ``DataLoader``, whose
    dataset is used (training batches and shuffles by the spec's seed, not by the
    loader's settings, so that a seed fixes the result). Validation is split off as for a
    file. Labels are read once, up front, to split and to count classes.
    """
    if isinstance(data, TaskData):
        return data
    shape = tuple(input_shape)
    where = type(data).__name__
    if isinstance(data, DataLoader):
        data = data.dataset
    notes: list[str] = []
    if isinstance(data, (tuple, list)) and len(data) == 2 and not isinstance(data, Dataset):
        x_raw, y_raw = (v.detach().cpu().numpy() if isinstance(v, torch.Tensor)
                        else np.asarray(v) for v in data)
        x: torch.Tensor | Rows = _features("the arrays", "x", x_raw, shape, False, notes)
        where = "the arrays"
    elif isinstance(data, Dataset):
        if not hasattr(data, "__len__") or not hasattr(data, "__getitem__"):
            raise DataError(f"a {where} without len() and indexing cannot be split or shuffled "
                            f"by a seed; pass a map-style Dataset of (x, y) pairs")
        n = len(data)  # type: ignore[arg-type]
        if n == 0:
            raise DataError(f"the {where} holds no samples")
        x = DatasetRows(data, n, shape, f"the {where}")
        y_raw = np.asarray([_label_of(data[i][1]) for i in range(n)])
    else:
        raise DataError(f"grow takes TaskData, (x, y) arrays, a torch Dataset of (x, y) pairs "
                        f"or a DataLoader, not {where}")
    y, names = _encode(where, "labels", y_raw, class_names, None)
    if y.shape[0] != int(x.shape[0]):
        raise DataError(f"{where}: {int(x.shape[0])} samples but {y.shape[0]} labels")
    classes = _class_count(where, y, names, classes)
    tr, va = stratified_split(y, val_fraction, seed)
    if len(va) == 0 or len(tr) == 0:
        raise DataError(f"{where}: too few samples ({len(y)}) to split off validation data")
    return TaskData(subset(x, tr), torch.from_numpy(y[tr]), subset(x, va),
                    torch.from_numpy(y[va]), classes, where, names, notes=notes)


def _label_of(value: object) -> object:
    if isinstance(value, torch.Tensor):
        return value.item()
    return value
