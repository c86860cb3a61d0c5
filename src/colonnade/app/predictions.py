"""What ``predict`` writes: one row per sample, as .csv for people or .npz for programs.

The .csv has a header and one row per sample: ``id`` (the file, relative to the data
folder, or the row number from 0), ``label`` when the data had labels, then per task its
predicted class (by name when the task has names) and its logits, one column per class.
With one task the columns are ``task``, ``predicted`` and ``logit:<class>``; with all
tasks ``<task>.predicted`` and ``<task>.logit:<class>``. Logits are written with nine
significant digits, which read back to the same float32 (IEEE 754: 9 digits round-trip
any single-precision value).

Accuracy is given for each task whose classes the labels fit: labels by name are mapped
onto the task's class names, integer labels must lie below its class count.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from ..model.parts import TaskInfo
from ..training.data import TaskData

__all__ = ["OUTPUT_SUFFIXES", "PredictionTable", "prediction_table"]

OUTPUT_SUFFIXES = (".npz", ".csv")


@dataclass
class PredictionTable:
    """Every task's logits on one data set, with sample ids, labels and accuracies."""

    ids: list[str]
    labels: list[str] | None  # each sample's label as written in the data, if any
    tasks: list[TaskInfo]
    logits: dict[str, torch.Tensor]
    accuracy: dict[str, float | None]

    @property
    def samples(self) -> int:
        return len(self.ids)

    def csv_bytes(self) -> bytes:
        one = len(self.tasks) == 1
        header = ["id"] + (["label"] if self.labels is not None else [])
        if one:
            header += ["task", "predicted"] + [f"logit:{_name(self.tasks[0], c)}"
                                               for c in range(self.tasks[0].classes)]
        else:
            for info in self.tasks:
                header += [f"{info.name}.predicted"] + [
                    f"{info.name}.logit:{_name(info, c)}" for c in range(info.classes)]
        preds = {t.name: self.logits[t.name].argmax(1).tolist() for t in self.tasks}
        values = {t.name: self.logits[t.name].tolist() for t in self.tasks}
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(header)
        for i, sample in enumerate(self.ids):
            row = [sample] + ([self.labels[i]] if self.labels is not None else [])
            for info in self.tasks:
                if one:
                    row.append(info.name)
                row.append(_name(info, preds[info.name][i]))
                row += [f"{v:.9g}" for v in values[info.name][i]]
            writer.writerow(row)
        # surrogateescape: a file name that is not valid UTF-8 is written as its own bytes
        return buf.getvalue().encode("utf-8", "surrogateescape")

    def npz_bytes(self, all_tasks: bool) -> bytes:
        arrays: dict[str, np.ndarray] = {}
        if all_tasks:
            arrays["tasks"] = np.array([t.name for t in self.tasks])
        for info in self.tasks:
            suffix = f"_{info.name}" if all_tasks else ""
            logits = self.logits[info.name]
            arrays[f"logits{suffix}"] = logits.numpy()
            arrays[f"pred{suffix}"] = logits.argmax(1).numpy()
            if info.class_names:
                arrays[f"classes{suffix}"] = np.array(info.class_names)
        if self.ids and not self.ids[0].isdigit():
            arrays["ids"] = np.array(self.ids)
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        return buf.getvalue()


def _name(info: TaskInfo, index: int) -> str:
    return info.class_name(index)


def _sample_ids(data: TaskData, n: int) -> list[str]:
    if data.ids is None:
        return [str(i) for i in range(n)]
    root = Path(data.source)
    root = root.parent if root.is_file() else root
    return [os.path.relpath(p, root) for p in data.ids]


def _task_labels(data: TaskData, info: TaskInfo) -> torch.Tensor | None:
    """The data's labels as ``info``'s class indices, or None where they do not fit."""
    y = data.y
    if data.class_names is not None:  # labels by name: map onto the task's names
        if info.class_names is None:
            names = data.class_names
            if not all(n.isdigit() and int(n) < info.classes for n in names):
                return None
            lookup = [int(n) for n in names]
        else:
            where = {n: i for i, n in enumerate(info.class_names)}
            if not all(n in where for n in data.class_names):
                return None
            lookup = [where[n] for n in data.class_names]
        return torch.tensor(lookup, dtype=torch.int64)[y]
    if int(y.max()) >= info.classes:
        return None
    return y


def prediction_table(data: TaskData, tasks: list[TaskInfo], logits: dict[str, torch.Tensor],
                     ) -> PredictionTable:
    n = int(data.x.shape[0])
    labelled = data.y.numel() > 0
    labels = None
    accuracy: dict[str, float | None] = {t.name: None for t in tasks}
    if labelled:
        labels = ([data.class_names[i] for i in data.y.tolist()] if data.class_names
                  else [str(i) for i in data.y.tolist()])
        for info in tasks:
            y = _task_labels(data, info)
            if y is not None:
                pred = logits[info.name].argmax(1)
                accuracy[info.name] = float((pred == y).double().mean())
    return PredictionTable(_sample_ids(data, n), labels, tasks, logits, accuracy)
