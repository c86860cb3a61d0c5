"""One growth step: add a column or a head for a new task, train it, freeze it, record it.

If anything fails or is interrupted, the new parts are removed again, so the in-memory
network is as it was; the workspace on disk is only written by ``store.save`` after.
"""

from __future__ import annotations

from typing import Any

import torch

from .data import TaskData
from .errors import UsageError
from .fit import evaluate, fit_task
from .network import ProgressiveNet
from .store import now

__all__ = ["grow", "resolve_device"]


def resolve_device(name: str | None) -> torch.device:
    """``cpu`` by default; ``cuda`` only where torch can see a GPU."""
    if name in (None, "", "cpu"):
        return torch.device("cpu")
    if name.startswith("cuda"):
        if not torch.cuda.is_available():
            raise UsageError("--device cuda was asked for, but this torch sees no CUDA GPU; "
                             "use --device cpu")
        return torch.device(name)
    raise UsageError(f"unknown device {name!r}; use cpu or cuda")


def _count(net: ProgressiveNet, parts: list[str]) -> int:
    modules = dict(net.part_modules())
    return sum(p.numel() for part in parts for p in modules[part].parameters())


def grow(net: ProgressiveNet, task: str, data: TaskData, mode: str = "column",
         on: str | None = None, width: float = 1.0, epochs: int | None = None,
         device: str | None = None, progress: bool = True) -> dict[str, Any]:
    """Grow ``task`` on ``net`` and train it on ``data``; returns the history entry.

    The task's seed is the spec's seed plus the number of tasks before it, so each task
    is reproducible on its own and tasks do not share initial weights.
    """
    if mode not in ("column", "head"):
        raise UsageError(f"unknown growth mode {mode!r}; use column or head")
    if mode == "column" and on is not None:
        raise UsageError("--on applies to --mode head only")
    if mode == "head" and width != 1.0:
        raise UsageError("--width applies to --mode column only")
    dev = resolve_device(device)
    seed = net.spec.train.seed + len(net.tasks)
    net.to(dev)
    if mode == "column":
        parts = net.add_column(task, data.classes, width=width, seed=seed)
    else:
        parts = net.add_head(task, data.classes, on=on, seed=seed)
    try:
        record = fit_task(net, task, data, net.spec.train, epochs=epochs, seed=seed,
                          progress=progress)
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
    net.meta["history"].append(entry)
    net.meta["records"][task] = {
        "train": record.to_dict(),
        "data": {"source": data.source, "n_train": data.n_train, "n_val": data.n_val},
        "val_accuracy": acc,
        "val_loss": loss,
    }
    return entry
