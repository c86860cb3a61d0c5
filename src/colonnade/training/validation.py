"""Measuring a growth step for the continual-learning record.

Each task's validation set is kept in the workspace (``validation.safetensors``) so that
every later growth step can evaluate every task again (row i of the accuracy matrix R),
and each new task is also evaluated before it is trained and on a network whose earlier
parts are re-initialised (R[i-1][i] and b[i]). The metrics that read these figures back
(ACC, BWT, FWT; Lopez-Paz & Ranzato 2017) are in ``colonnade.evidence.transfer``.
"""

from __future__ import annotations

import copy
from collections.abc import Iterable
from typing import Any

import numpy as np
import torch

from ..model.network import ProgressiveNet
from .data import TaskData, stratified_split
from .datasets import Rows, materialize, subset
from .fit import evaluate

__all__ = ["VAL_FILE", "REMEASURED", "store_validation", "validation", "accuracies",
           "random_init_copy", "before_training", "after_training", "remeasure"]

VAL_FILE = "validation.safetensors"
# A history step after a change to a task's own parts (trim, merge, fine-tune, retrain):
# the task's accuracy on its stored validation data before and after the change. The
# record (evidence.transfer) reads it back.
REMEASURED = "task_remeasured"
# The most validation data kept in the workspace per task. Beyond it a stratified,
# seeded sample of that size is kept, so a streamed data set does not copy gigabytes
# into the workspace (and into memory at every load); the record says so.
VAL_KEEP_BYTES = 32 << 20


def store_validation(net: ProgressiveNet, task: str, x: torch.Tensor | Rows, y: torch.Tensor,
                     seed: int = 0) -> str | None:
    """Keep a task's validation data in the workspace; returns a note if it was sampled."""
    n = int(x.shape[0])
    row_bytes = 4 * int(np.prod(tuple(x.shape[1:]), dtype=np.int64))
    note = None
    if n and n * row_bytes > VAL_KEEP_BYTES:
        keep = max(VAL_KEEP_BYTES // max(row_bytes, 1), 1)
        _, rows = stratified_split(y.numpy(), keep / n, seed)
        x, y = subset(x, rows), y[torch.from_numpy(rows)]
        note = (f"validation data kept in the workspace: a stratified sample of "
                f"{len(rows)} of {n} rows (at most {VAL_KEEP_BYTES >> 20} MiB)")
    files = net.attachments.setdefault(VAL_FILE, {})
    files[f"{task}/x"] = materialize(x).detach().cpu().contiguous()
    files[f"{task}/y"] = y.detach().cpu().contiguous()
    return note


def validation(net: ProgressiveNet, task: str) -> tuple[torch.Tensor, torch.Tensor] | None:
    files = net.attachments.get(VAL_FILE, {})
    if f"{task}/x" not in files or f"{task}/y" not in files:
        return None
    return files[f"{task}/x"], files[f"{task}/y"]


def accuracies(net: ProgressiveNet, tasks: Iterable[str] | None = None,
               ) -> dict[str, float | None]:
    """Every task's (or the named tasks') accuracy on its stored validation data (None
    where none is stored)."""
    out: dict[str, float | None] = {}
    for task in net.tasks if tasks is None else tasks:
        val = validation(net, task)
        out[task] = None if val is None or val[1].numel() == 0 else evaluate(net, task, *val)[0]
    return out


def random_init_copy(net: ProgressiveNet, keep: Iterable[str], seed: int) -> ProgressiveNet:
    """A copy whose parts, except ``keep``, are freshly initialised (seeded, no side effect).

    An adopted column 0 is kept as it is: a model brought from outside has no
    initialiser of colonnade's, so the random network is random beside it.
    """
    keep = set(keep) | ({"column:0"} if net.adopted is not None else set())
    saved = net.attachments, net.meta
    net.attachments, net.meta = {}, {"history": [], "records": {}}
    try:
        clone = copy.deepcopy(net)
    finally:
        net.attachments, net.meta = saved
    devices = [net.device.index or 0] if net.device.type == "cuda" else []
    with torch.random.fork_rng(devices=devices), torch.no_grad():
        torch.manual_seed(seed)
        for part, module in clone.part_modules():
            if part in keep:
                continue
            for m in module.modules():
                reset = getattr(m, "reset_parameters", None)
                if callable(reset):
                    reset()
    clone.eval()
    return clone


def before_training(net: ProgressiveNet, task: str, parts: Iterable[str], data: TaskData,
                    seed: int) -> dict[str, float | None]:
    """R[i-1][i] and b[i] for a task whose new ``parts`` were just added, untrained."""
    if data.n_val == 0:
        return {"before_training": None, "random_init": None}
    before = evaluate(net, task, data.x_val, data.y_val)[0]
    clone = random_init_copy(net, parts, seed)
    return {"before_training": before,
            "random_init": evaluate(clone, task, data.x_val, data.y_val)[0]}


def after_training(net: ProgressiveNet, task: str, data: TaskData, entry: dict[str, Any],
                   before: dict[str, float | None]) -> None:
    """Keep the task's validation data and add row i of R to the growth entry."""
    note = store_validation(net, task, data.x_val, data.y_val, net.spec.train.seed)
    if note is not None:
        entry["validation_kept"] = note
    entry["val_accuracies"] = accuracies(net)
    entry.update(before)


def remeasure(net: ProgressiveNet, task: str, cause: str, before: float | None,
              when: str) -> dict[str, Any] | None:
    """Record a task's accuracy after a change to its parts, keeping the figure before.

    ``before`` is the accuracy on the stored validation data before the change (measure
    it with ``accuracies`` first). Appends a ``task_remeasured`` history step holding
    both figures, and sets the task's record to the new one (the growth-time figure stays
    under ``val_accuracy_at_growth``). Returns the step, or None without stored data.
    """
    val = validation(net, task)
    if val is None or val[1].numel() == 0:
        return None
    after, loss = evaluate(net, task, *val)
    step = {"step": REMEASURED, "task": task, "time": when, "cause": cause,
            "val_accuracy_before": before, "val_accuracy": after,
            "measured_on": "the task's stored validation data"}
    net.meta["history"].append(step)
    rec = net.meta["records"].setdefault(task, {})
    rec.setdefault("val_accuracy_at_growth", rec.get("val_accuracy"))
    rec["val_accuracy"], rec["val_loss"] = after, loss
    return step
