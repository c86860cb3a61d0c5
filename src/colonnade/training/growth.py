"""One growth step: add a column or a head for a new task, train it, freeze it, record it.

If anything fails or is interrupted, the new parts are removed again, so the in-memory
network is as it was; the workspace on disk is only written by ``store.save`` after.
"""

from __future__ import annotations

import copy
import math
from typing import Any

from ..clock import now
from ..errors import UsageError
from ..model.device import resolve_device
from ..model.network import ProgressiveNet
from . import validation as transfer
from .checks import check_training_data
from .data import TaskData, task_data_from
from .fit import Transform, evaluate, fit_task
from .input_stats import fit_normalization

__all__ = ["grow"]


def _count(net: ProgressiveNet, parts: list[str]) -> int:
    modules = dict(net.part_modules())
    return sum(p.numel() for part in parts for p in modules[part].parameters())


def grow(net: ProgressiveNet, task: str, data: Any, mode: str = "column",
         on: str | None = None, width: float = 1.0, epochs: int | None = None,
         device: str | None = None, progress: bool = True, transform: Transform | None = None,
         cache: bool | None = None, cache_mb: float | None = None,
         target: float | None = None, ddp: Any = None, classes_given: bool = False,
         workers: int = 0) -> dict[str, Any]:
    """Grow ``task`` on ``net`` and train it on ``data``; returns the history entry.

    ``data`` is ``TaskData`` (``load_task_data``), ``(x, y)`` arrays, a torch ``Dataset``
    of ``(x, y)`` pairs or a ``DataLoader`` (``task_data_from``: validation is split off
    by the spec's ``val_fraction`` and seed). ``workers`` > 0 reads streamed batches in
    DataLoader worker processes.

    The training data is checked first (checks.py): refused when a class has no
    training rows (unless ``classes_given``: the class count was asked for), warned
    about when a class is thin or missing from validation (``entry["data_warnings"]``).

    ``mode="auto"`` grows only a head when that reaches ``target`` validation accuracy,
    else a column (``_grow_auto``).

    The task's seed is the spec's seed plus the number of tasks before it, so each task
    is reproducible on its own and tasks do not share initial weights. ``transform``,
    ``cache``, ``cache_mb`` and ``ddp`` (data-parallel training, distributed.py) go to
    ``fit_task``.
    """
    data = task_data_from(data, net.input_shape, val_fraction=net.spec.train.val_fraction,
                          seed=net.spec.train.seed)
    # Data-parallel ranks see one shard each; distributed.run_rank checks the whole data.
    found = check_training_data(data.y, data.y_val, data.classes, data.source,
                                classes_given=classes_given) if ddp is None else None
    if mode == "auto":
        entry = _grow_auto(net, task, data, target, on=on, width=width, epochs=epochs,
                           device=device, progress=progress, transform=transform, cache=cache,
                           cache_mb=cache_mb, ddp=ddp, workers=workers)
    else:
        entry = _grow_one(net, task, data, mode, on, width, epochs, device, progress,
                          transform, cache, cache_mb, target, ddp, workers=workers)
    if found is not None and found.warnings:
        entry["data_warnings"] = list(found.warnings)
    return entry


def _grow_one(net: ProgressiveNet, task: str, data: TaskData, mode: str, on: str | None,
              width: float, epochs: int | None, device: str | None, progress: bool,
              transform: Transform | None, cache: bool | None, cache_mb: float | None,
              target: float | None, ddp: Any, label: str | None = None, workers: int = 0,
              ) -> dict[str, Any]:
    """One growth step of a fixed mode (``grow`` without the checks and auto mode)."""
    if target is not None:
        raise UsageError("--target applies to --mode auto only")
    if mode not in ("column", "head"):
        raise UsageError(f"unknown growth mode {mode!r}; use column, head or auto")
    if mode == "column" and on is not None:
        raise UsageError("--on applies to --mode head or auto only")
    if mode == "head" and width != 1.0:
        raise UsageError("--width applies to --mode column only")
    dev = resolve_device(device)
    seed = net.spec.train.seed + len(net.tasks)
    net.to(dev)
    fitted = _fit_normalization(net, data)
    if mode == "column":
        parts = net.add_column(task, data.classes, width=width, seed=seed,
                               class_names=data.class_names)
    else:
        parts = net.add_head(task, data.classes, on=on, seed=seed, class_names=data.class_names)
    try:
        # R[i-1][i] and the random-network accuracy b[i], before training (transfer.py).
        before = transfer.before_training(net, task, parts, data, seed)
        record = fit_task(net, task, data, net.spec.train, epochs=epochs, seed=seed,
                          progress=progress, transform=transform, cache=cache,
                          cache_mb=cache_mb, ddp=ddp, label=label, workers=workers)
    except BaseException:
        net.remove_task(task)
        raise
    finally:
        net.freeze()
    acc, loss = evaluate(net, task, data.x_val, data.y_val)
    info = net.task(task)
    entry = {
        "step": "column_added" if mode == "column" else "head_added",
        "task": task,
        "time": now(),
        "column": info.column,
        "width": float(width),
        "classes": data.classes,
        "params_added": _count(net, parts),
        "val_accuracy": acc,
        "device": str(dev),
    }
    if fitted is not None:
        entry["input_normalization"] = fitted
    transfer.after_training(net, task, data, entry, before)  # row i of R; keeps x_val, y_val
    net.meta["history"].append(entry)
    net.meta["records"][task] = {
        "train": record.to_dict(),
        "data": _data_record(data),
        "val_accuracy": acc,
        "val_loss": loss,
    }
    return entry


def _fit_normalization(net: ProgressiveNet, data: TaskData) -> dict[str, Any] | None:
    """``normalize: fit``: per-channel mean and std of the first task's training data."""
    if net.spec.normalize != "fit" or net.tasks:
        return None
    mean, std, notes = fit_normalization(data.x)
    net.set_normalization(mean, std)
    return {"fitted_on": "training data", "mean": mean, "std": std, "notes": notes}


def _data_record(data: TaskData) -> dict[str, Any]:
    """Where the task's data came from and what loading it did, for the manifest."""
    record: dict[str, Any] = {"source": data.source, "n_train": data.n_train,
                              "n_val": data.n_val}
    if data.streamed:
        record["streamed"] = True
    if data.notes:
        record["notes"] = list(data.notes)
    if data.skipped:
        record["skipped"] = len(data.skipped)
        record["skipped_files"] = list(data.skipped[:20])
    return record


def _grow_auto(net: ProgressiveNet, task: str, data: TaskData, target: float | None,
               on: str | None = None, width: float = 1.0, **kw: Any) -> dict[str, Any]:
    """Grow only when needed: a head on a frozen column if it reaches ``target``, else a column.

    The head is tried on the column of ``on`` (default: the newest column). Below the
    target it is rolled back (``remove_task``, and the records it added) and a full
    column is grown with the seed it would have had anyway. The history entry says which
    was chosen and why, under ``auto``.
    """
    if target is None or not (isinstance(target, (int, float)) and math.isfinite(target)
                              and 0 < target <= 1):
        raise UsageError(f"--mode auto needs --target ACCURACY, a validation accuracy in "
                         f"(0, 1] such as 0.9, got {target}")
    if data.n_val == 0:
        raise UsageError("--mode auto compares validation accuracy with --target, but the "
                         "data has no validation samples; pass --val FILE")
    kw = dict(epochs=kw.get("epochs"), device=kw.get("device"), progress=kw.get("progress", True),
              transform=kw.get("transform"), cache=kw.get("cache"), cache_mb=kw.get("cache_mb"),
              target=None, ddp=kw.get("ddp"), workers=kw.get("workers", 0))
    if not net.columns:
        entry = _grow_one(net, task, data, "column", None, width, label="growing a column",
                          **kw)
        entry["auto"] = {"chose": "column", "target": float(target), "head_val_accuracy": None,
                         "reason": "the network has no frozen column to carry a head yet"}
        _column_vs_target(entry, float(target))
        return entry
    meta = copy.deepcopy(net.meta)
    attachments = {name: dict(tensors) for name, tensors in net.attachments.items()}
    head = _grow_one(net, task, data, "head", on, 1.0, label="auto: trying a head", **kw)
    acc, column = head["val_accuracy"], head["column"]
    if acc >= target:
        head["auto"] = {"chose": "head", "target": float(target), "head_val_accuracy": acc,
                        "reason": f"a head on frozen column {column} reached validation "
                                  f"accuracy {acc:.4f}, at least the target {target:g}"}
        return head
    net.remove_task(task)
    net.meta.clear()
    net.meta.update(meta)
    net.attachments.clear()
    net.attachments.update(attachments)
    entry = _grow_one(net, task, data, "column", None, width,
                      label="auto: growing a column", **kw)
    entry["auto"] = {"chose": "column", "target": float(target), "head_val_accuracy": acc,
                     "head_column": column,
                     "reason": f"a head on frozen column {column} reached only validation "
                               f"accuracy {acc:.4f}, below the target {target:g}, so it was "
                               f"rolled back and a column grown"}
    _column_vs_target(entry, float(target))
    return entry


def _column_vs_target(entry: dict[str, Any], target: float) -> None:
    """Say whether the grown column met ``--target`` too, and if not by how much."""
    acc = entry["val_accuracy"]
    entry["auto"]["column_val_accuracy"] = acc
    entry["auto"]["column_met_target"] = bool(acc >= target)
    if acc < target:
        entry["auto"]["column_short_by"] = target - acc
        entry["auto"]["reason"] += (f"; the column also missed the target: validation "
                                    f"accuracy {acc:.4f}, {target - acc:.4f} short of "
                                    f"{target:g}")
