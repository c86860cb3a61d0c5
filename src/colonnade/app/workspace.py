"""Workspace verbs of the network itself: ``new``, ``grow`` and ``predict`` (``show``: show.py).

Each opens the workspace through ``transaction``, acts through the library, and commits
once, only when the action succeeded, so a failure or Ctrl-C leaves the folder exactly
as it was.
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import UsageError
from ..files.store import atomic_write, create
from ..model.network import ProgressiveNet
from ..training.data import load_task_data
from ..training.distributed import launched_by_torchrun
from ..training.fit import EVAL_BATCH, all_task_logits, task_logits
from ..training.growth import grow
from .distributed_grow import GrowRequest, grow_distributed, run_torchrun_rank
from .transaction import read_workspace, writing

__all__ = ["new_workspace", "grow_workspace", "predict_file"]


def new_workspace(spec_path: str | Path, folder: str | Path) -> ProgressiveNet:
    return create(spec_path, folder)


def grow_workspace(folder: str | Path, task: str, train: str | Path, val: str | Path | None = None,
                   mode: str = "column", on: str | None = None, width: float = 1.0,
                   classes: int | None = None, epochs: int | None = None,
                   device: str | None = None, progress: bool = True, cache: bool | None = None,
                   cache_mb: float | None = None, target: float | None = None,
                   nproc: int | None = None) -> dict[str, Any]:
    """Grow one task in a workspace from data files; returns the history entry.

    ``nproc`` >= 2 trains data-parallel on this machine; inside a torchrun launch every
    rank trains data-parallel and rank 0 writes (distributed.py).
    """
    if nproc is not None or launched_by_torchrun():
        request = GrowRequest(str(folder), task, str(train), None if val is None else str(val),
                              mode, on, width, classes, epochs, device, cache, cache_mb, target)
        if nproc is not None:
            return grow_distributed(request, nproc, progress=progress)
        return run_torchrun_rank(request, progress=progress)
    with writing(folder, "grow") as tx:
        return _grow(tx.net, folder, task, train, val, mode, on, width, classes, epochs,
                     device, progress, cache, cache_mb, target)


def _grow(net: ProgressiveNet, folder: str | Path, task: str, train: str | Path,
          val: str | Path | None, mode: str, on: str | None, width: float, classes: int | None,
          epochs: int | None, device: str | None, progress: bool, cache: bool | None,
          cache_mb: float | None, target: float | None) -> dict[str, Any]:
    if task in net.task_info:
        raise UsageError(f"a task named {task!r} exists already in {folder}; choose another "
                         f"name")
    if mode == "head" and not net.columns:
        raise UsageError("the workspace has no column yet; grow the first task with "
                         "--mode column")
    if on is not None:
        net.task(on)
    data = load_task_data(train, net.input_shape, classes=classes, val_path=val,
                          val_fraction=net.spec.train.val_fraction, seed=net.spec.train.seed)
    entry = grow(net, task, data, mode=mode, on=on, width=width, epochs=epochs, device=device,
                 progress=progress, cache=cache, cache_mb=cache_mb, target=target,
                 classes_given=classes is not None)
    return entry


def predict_file(folder: str | Path, task: str | None, data: str | Path, out: str | Path,
                 all_tasks: bool = False) -> dict[str, Any]:
    """Write a task's logits and predictions on a data file to an .npz, atomically.

    One task: arrays ``logits`` and ``pred``. ``all_tasks``: one pass of ``forward_all``
    (each column once per batch) and, for every task, ``logits_<task>`` and
    ``pred_<task>``, plus ``tasks``, the task names in growth order.
    """
    if all_tasks and task is not None:
        raise UsageError("give either --task NAME or --all, not both")
    if not all_tasks and task is None:
        raise UsageError("name one task with --task NAME, or pass --all for every task")
    out = Path(out)
    if out.suffix.lower() != ".npz":
        raise UsageError(f"{out}: the output must be an .npz file")
    if not out.parent.is_dir():
        raise UsageError(f"{out.parent}: no such folder for the output")
    net = read_workspace(folder)
    if all_tasks:
        if not net.tasks:
            raise UsageError(f"{folder} has no task yet; grow one before predicting")
        # Labels, if any, are ignored here; checked only against the largest class count.
        most = max(info.classes for info in net.task_info.values())
        loaded = load_task_data(data, net.input_shape, classes=most, need_labels=False,
                                split=False)
        every = all_task_logits(net, loaded.x, EVAL_BATCH)
        arrays: dict[str, np.ndarray] = {"tasks": np.array(net.tasks)}
        for name, logits in every.items():
            arrays[f"logits_{name}"] = logits.numpy()
            arrays[f"pred_{name}"] = logits.argmax(1).numpy()
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        atomic_write(out, buf.getvalue())
        return {"tasks": net.tasks, "samples": int(loaded.x.shape[0]), "output": str(out)}
    info = net.task(task)
    loaded = load_task_data(data, net.input_shape, classes=info.classes, need_labels=False,
                            split=False)
    x, y = loaded.x, loaded.y
    logits = task_logits(net, task, x, EVAL_BATCH)
    pred = logits.argmax(1)
    buf = io.BytesIO()
    np.savez(buf, logits=logits.numpy(), pred=pred.numpy())
    atomic_write(out, buf.getvalue())
    result: dict[str, Any] = {"task": task, "samples": int(x.shape[0]), "output": str(out)}
    if y.numel():
        result["accuracy"] = float((pred == y).double().mean())
    return result
