"""Workspace verbs of the network itself: ``new``, ``grow`` and ``predict`` (``show``: show.py).

Each opens the workspace through ``transaction``, acts through the library, and commits
once, only when the action succeeded, so a failure or Ctrl-C leaves the folder exactly
as it was.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..errors import UsageError
from ..evidence.provenance import growth_provenance
from ..files.store import atomic_write, create
from ..model.network import ProgressiveNet
from ..training.data import load_for_spec
from ..training.distributed import launched_by_torchrun, torchrun_rank
from ..training.fit import EVAL_BATCH, all_task_logits, task_logits
from ..training.growth import grow
from .distributed_grow import (
    DataOptions,
    GrowRequest,
    grow_distributed,
    growth_data,
    run_torchrun_rank,
)
from .predictions import OUTPUT_SUFFIXES, prediction_table
from .transaction import attribution, read_workspace, writing

__all__ = ["new_workspace", "grow_workspace", "predict_file"]


def new_workspace(spec_path: str | Path, folder: str | Path, by: str | None = None,
                  reason: str | None = None, sign: str | Path | None = None,
                  ) -> ProgressiveNet:
    """``colonnade new``: a workspace from a spec; its record starts with ``created``."""
    return create(spec_path, folder, who=attribution("new", by, reason, sign))


def grow_workspace(folder: str | Path, task: str, train: str | Path, val: str | Path | None = None,
                   mode: str = "column", on: str | None = None, width: float = 1.0,
                   classes: int | None = None, epochs: int | None = None,
                   device: str | None = None, progress: bool = True, cache: bool | None = None,
                   cache_mb: float | None = None, target: float | None = None,
                   nproc: int | None = None, labels: str | Path | None = None,
                   skip_bad: bool = False, class_names: list[str] | None = None,
                   workers: int = 0, by: str | None = None, reason: str | None = None,
                   sign: str | Path | None = None) -> dict[str, Any]:
    """Grow one task in a workspace from data files; returns the history entry.

    ``train`` is an .npz, a .csv, a .npy of samples with ``labels`` (a .npy of labels), or
    a folder of class folders (``skip_bad``: leave unreadable files out, and record how
    many). ``class_names`` names integer classes 0..C-1 (or fixes the order of named
    ones). ``nproc`` >= 2 trains data-parallel on this machine; inside a torchrun launch
    every rank trains data-parallel and rank 0 writes (distributed.py). The entry records
    the data's provenance (digests, rows, shape, dtype, rows per class); ``by``, ``reason``
    and ``sign`` go to the record (transaction.py).
    """
    options = DataOptions(None if labels is None else str(labels), skip_bad,
                          None if class_names is None else list(class_names))
    if nproc is not None or launched_by_torchrun():
        request = GrowRequest(str(folder), task, str(train), None if val is None else str(val),
                              mode, on, width, classes, epochs, device, cache, cache_mb, target,
                              options)
        if nproc is not None:
            return grow_distributed(request, nproc, progress=progress,
                                    who=attribution("grow", by, reason, sign))
        # Every rank runs the launching command line; only the rank that commits (rank 0)
        # reads the signing key, which the other machines need not hold.
        who = attribution("grow", by, reason, sign) if torchrun_rank() == 0 else None
        return run_torchrun_rank(request, progress=progress, who=who)
    with writing(folder, "grow", by=by, reason=reason, sign=sign) as tx:
        return _grow(tx.net, folder, task, train, val, mode, on, width, classes, epochs,
                     device, progress, cache, cache_mb, target, options, workers)


def _grow(net: ProgressiveNet, folder: str | Path, task: str, train: str | Path,
          val: str | Path | None, mode: str, on: str | None, width: float, classes: int | None,
          epochs: int | None, device: str | None, progress: bool, cache: bool | None,
          cache_mb: float | None, target: float | None, options: DataOptions, workers: int,
          ) -> dict[str, Any]:
    if task in net.task_info:
        retired = " (retired, its record kept)" if net.task(task).state != "live" else ""
        raise UsageError(f"a task named {task!r} exists already in {folder}{retired}; choose "
                         f"another name, or retrain it with 'colonnade retrain'")
    if mode == "head" and not net.columns:
        raise UsageError("the workspace has no column yet; grow the first task with "
                         "--mode column")
    if on is not None:
        net.task(on)
    data = growth_data(net.spec, train, val, classes, options)
    entry = grow(net, task, data, mode=mode, on=on, width=width, epochs=epochs, device=device,
                 progress=progress, cache=cache, cache_mb=cache_mb, target=target,
                 classes_given=classes is not None, workers=workers)
    provenance = growth_provenance(data, train, val, net.spec.train.val_fraction,
                                   net.spec.train.seed, options.labels)
    entry["data"] = provenance
    net.meta["records"][task].setdefault("data", {}).update(provenance)
    # What loading the data did (notes, skipped files), for the caller to print; the
    # history entry itself stays as recorded.
    return {**entry, "data": net.meta["records"][task]["data"]}


def predict_file(folder: str | Path, task: str | None, data: str | Path, out: str | Path,
                 all_tasks: bool = False, labels: str | Path | None = None,
                 skip_bad: bool = False) -> dict[str, Any]:
    """Write predictions on a data file or folder to ``out`` (.npz or .csv), atomically.

    The data may be unlabelled (a CSV without ``label``, a folder of files, a .npy) or
    labelled; with labels the result carries the accuracy (per task with ``all_tasks``,
    for each task whose classes the labels fit). .npz: arrays ``logits`` and ``pred`` for
    one task, or ``logits_<task>``/``pred_<task>`` and ``tasks`` for all (one pass of
    ``forward_all``), plus ``classes``/``classes_<task>`` (class names). .csv: one row per
    sample (``predictions.py``).
    """
    if all_tasks and task is not None:
        raise UsageError("give either --task NAME or --all, not both")
    if not all_tasks and task is None:
        raise UsageError("name one task with --task NAME, or pass --all for every task")
    out = Path(out)
    if out.suffix.lower() not in OUTPUT_SUFFIXES:
        raise UsageError(f"{out}: the output must be an .npz or .csv file")
    if not out.parent.is_dir():
        raise UsageError(f"{out.parent}: no such folder for the output")
    net = read_workspace(folder)
    if all_tasks and not net.live_tasks:
        raise UsageError(f"{folder} has no live task; grow one before predicting")
    if not all_tasks and net.task(task).state != "live":
        raise UsageError(f"task {task!r} is retired, so it is no longer predicted; its "
                         f"record stays in 'colonnade show'")
    tasks = net.live_tasks if all_tasks else [task]
    infos = [net.task(t) for t in tasks]
    if all_tasks:  # labels, if any, keep their own names; each task maps them on its own
        loaded = load_for_spec(data, net.spec, need_labels=False, split=False, labels=labels,
                               skip_bad=skip_bad)
        logits = all_task_logits(net, loaded.x, EVAL_BATCH)
    else:
        loaded = load_for_spec(data, net.spec, classes=infos[0].classes,
                               class_names=infos[0].class_names, need_labels=False,
                               split=False, labels=labels, skip_bad=skip_bad)
        logits = {task: task_logits(net, task, loaded.x, EVAL_BATCH)}
    table = prediction_table(loaded, infos, logits)
    atomic_write(out, table.csv_bytes() if out.suffix.lower() == ".csv"
                 else table.npz_bytes(all_tasks))
    result: dict[str, Any] = {"tasks": tasks, "samples": table.samples, "output": str(out),
                              "accuracy": table.accuracy, "skipped": len(loaded.skipped)}
    if not all_tasks:
        result["task"] = task
        if table.accuracy.get(task) is not None:
            result["accuracy"] = table.accuracy[task]
        else:
            del result["accuracy"]
    return result
