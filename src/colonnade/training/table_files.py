"""Data read whole from one file (.npz, CSV of feature rows), and the ``Source`` every
reader returns.

Kept apart from ``sources`` (which chooses the reader and streams .npy files and folders)
because these readers never stream: an .npz or a CSV is parsed into arrays at once, and
the same code reads bytes already in memory (a probe kept in the workspace).
"""

from __future__ import annotations

import csv
import io
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import DataError
from .datasets import Rows, checked_float32

__all__ = ["Source", "IsIndex", "read_npz", "read_csv_rows", "read_csv"]


class IsIndex(Exception):
    """A CSV whose header names a 'file' column: an index of sample files."""


@dataclass
class Source:
    """Samples and raw labels read from one place, before labels get their meaning."""

    x: np.ndarray | Rows
    y: np.ndarray | None  # integers or class names (str), one per sample; None: unlabelled
    path: str
    class_names: list[str] | None = None  # for a class folder: every folder, sorted
    x_val: np.ndarray | None = None
    y_val: np.ndarray | None = None
    ids: list[str] | None = None  # a name per sample (files) for prediction output
    notes: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    flat_rows: bool = False  # a CSV: rows are flat by nature and may be reshaped
    label_name: str = "labels"  # what messages call the labels: "y" in an .npz


# --------------------------------------------------------------------- .npz and .csv
def read_npz(path: Path, content: bytes | None = None) -> dict[str, np.ndarray]:
    try:
        with np.load(path if content is None else io.BytesIO(content),
                     allow_pickle=False) as f:
            return {k: f[k] for k in f.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise DataError(f"{path}: cannot read as .npz ({exc.__class__.__name__}); write it "
                        f"with numpy.savez(x=..., y=...)") from None


def _number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def read_csv_rows(path: Path, content: bytes | None = None) -> list[list[str]]:
    try:
        if content is not None:
            rows = [r for r in csv.reader(io.StringIO(content.decode("utf-8"), newline=""))
                    if r]
        else:
            with open(path, newline="", encoding="utf-8") as f:
                rows = [r for r in csv.reader(f) if r]
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise DataError(f"{path}: cannot read as CSV ({exc.__class__.__name__})") from None
    if not rows:
        raise DataError(f"{path}: the file is empty; it needs a header row")
    return rows


def read_csv(path: Path, need_labels: bool, content: bytes | None = None) -> Source:
    rows = read_csv_rows(path, content)
    header = [h.strip() for h in rows[0]]
    if "file" in header:
        raise IsIndex
    if "label" not in header and need_labels:
        raise DataError(f"{path}: no column named 'label' in the header; add one with the "
                        f"class of each row")
    if len(rows) < 2:
        raise DataError(f"{path}: the file holds a header but no rows")
    li = header.index("label") if "label" in header else None
    labels: list[str] = []
    feats = np.empty((len(rows) - 1, len(header) - (li is not None)), dtype=np.float64)
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise DataError(f"{path}: line {n} has {len(row)} fields, the header {len(header)}")
        values = [v for i, v in enumerate(row) if i != li]
        for j, v in enumerate(values):
            number = _number(v)
            if number is None:
                name = [h for i, h in enumerate(header) if i != li][j]
                raise DataError(f"{path}: line {n}, column {name!r} holds {v.strip()!r}, "
                                f"not a number")
            feats[n - 2, j] = number
        if li is not None:
            labels.append(row[li].strip())
    y = None
    if li is not None:
        numbers = [_number(v) for v in labels]
        y = (np.asarray(labels) if any(v is None for v in numbers)
             else np.asarray(numbers, dtype=np.float64))
    names = [h for i, h in enumerate(header) if i != li]

    def where(row: int) -> str:
        return f"{path}: line {row + 2}"

    x = _csv_float32(feats, where, names)
    return Source(x, y, str(path), flat_rows=True)


def _csv_float32(feats: np.ndarray, where, names: list[str]) -> np.ndarray:
    """CSV numbers parse as float64; refuse those float32 cannot hold, naming the column."""
    try:
        return checked_float32(feats, where)
    except DataError as exc:
        text = str(exc)
        for j, name in enumerate(names):  # "feature J" -> the column's own name
            text = text.replace(f"feature {j} ", f"column {name!r} ", 1) \
                if f"feature {j} " in text else text
        raise DataError(text) from None
