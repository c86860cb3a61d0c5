"""Data provenance: which training and validation data a growth step used.

A path says where data was, not what it was. Each growth step therefore records, for its
training and its validation data, the data file's SHA-256 and size, and a fingerprint of
the samples as they were used (row count, sample shape, dtype, rows per class and a digest
over the tensors), so that ``check --data FILE --task NAME`` can say whether a file is the
one a task was trained on, byte for byte or, when the file was re-written, sample for
sample.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import torch

from ..model.digest import raw_bytes, tensor_record
from ..training.sources import source_digest

__all__ = ["file_fingerprint", "sample_fingerprint", "growth_provenance", "match_data"]


def file_fingerprint(path: str | Path, labels: str | Path | None = None) -> dict[str, Any]:
    """A data source's SHA-256 (one file, a folder, or a .npy with its labels file, as
    ``training.sources.source_digest`` defines it) and, for one file, its size; the path
    is kept for information only."""
    path = Path(path)
    out: dict[str, Any] = {"file": str(path), "sha256": source_digest(path, labels)}
    if path.is_file():
        out["bytes"] = path.stat().st_size
    if labels is not None:
        out["labels"] = str(labels)
    return out


_CHUNK_BYTES = 8 << 20  # hashed at a time, so data read on demand is never held whole


def _samples_digest(x: Any, y: torch.Tensor) -> str:
    """SHA-256 over the samples as float32 rows (read in chunks) and the labels."""
    h = hashlib.sha256()
    n = int(x.shape[0])
    row_bytes = 4 * int(np.prod([int(d) for d in x.shape[1:]], dtype=np.int64))
    step = max(1, _CHUNK_BYTES // max(1, row_bytes))
    for start in range(0, n, step):
        rows = x[np.arange(start, min(n, start + step))]
        h.update(raw_bytes(torch.as_tensor(rows)))
    h.update(tensor_record("y", y.reshape(-1).to(torch.int64).cpu()))
    return h.hexdigest()


def sample_fingerprint(x: Any, y: torch.Tensor, classes: int) -> dict[str, Any]:
    """Rows, sample shape, dtype, rows per class, and one digest over samples and labels.

    ``x`` is a tensor or rows read on demand (``training.datasets.Rows``), hashed alike.
    """
    counts = torch.bincount(y.reshape(-1).to(torch.int64).cpu(), minlength=classes)
    dtype = x.dtype if isinstance(x, torch.Tensor) else torch.float32
    return {"rows": int(x.shape[0]), "shape": [int(d) for d in x.shape[1:]],
            "dtype": str(dtype).removeprefix("torch."),
            "class_counts": [int(c) for c in counts.tolist()],
            "samples_sha256": _samples_digest(x, y)}


def growth_provenance(data: Any, train: str | Path | None, val: str | Path | None,
                      val_fraction: float | None = None, seed: int | None = None,
                      labels: str | Path | None = None) -> dict[str, Any]:
    """What a growth step records about its data (``data`` is a ``TaskData``).

    With no validation file the validation rows are a split of the training file, so both
    carry that file's digest and ``split`` says how they were drawn.
    """
    out: dict[str, Any] = {
        "train": {**(file_fingerprint(train, labels) if train is not None else {}),
                  **sample_fingerprint(data.x, data.y, data.classes)},
        "val": {**(file_fingerprint(val) if val is not None
                   else file_fingerprint(train, labels) if train is not None else {}),
                **sample_fingerprint(data.x_val, data.y_val, data.classes)},
    }
    if val is None and val_fraction is not None:
        out["split"] = {"val_fraction": float(val_fraction), "seed": seed}
    return out


def match_data(recorded: Mapping[str, Any], sha256: str,
               samples: Mapping[str, Any] | None) -> tuple[str | None, str]:
    """Which recorded role (``train``/``val``) a file plays, and one sentence saying so.

    ``samples`` is the file's own ``sample_fingerprint`` (all rows), used when the bytes
    differ: a re-saved file can still hold exactly the samples a task was trained on.
    """
    for role in ("train", "val"):
        entry = recorded.get(role)
        if isinstance(entry, Mapping) and entry.get("sha256") == sha256:
            word = "training" if role == "train" else "validation"
            return role, f"it is the {word} data file of the task, byte for byte"
    for role in ("train", "val"):
        entry = recorded.get(role)
        if (isinstance(entry, Mapping) and samples is not None
                and entry.get("samples_sha256") == samples.get("samples_sha256")):
            word = "training" if role == "train" else "validation"
            return role, (f"its bytes differ from the recorded {word} file, but it holds "
                          f"exactly the {word} samples and labels of the task")
    train = recorded.get("train") if isinstance(recorded.get("train"), Mapping) else {}
    detail = ""
    if samples is not None and train:
        differs = [f"{k} {samples.get(k)} against {train.get(k)}"
                   for k in ("rows", "shape", "dtype", "class_counts")
                   if samples.get(k) != train.get(k)]
        if differs:
            detail = f" ({'; '.join(differs)})"
    return None, (f"it is not the data the task was trained or validated on: its SHA-256 "
                  f"{sha256[:16]}... matches neither recorded file{detail}")
