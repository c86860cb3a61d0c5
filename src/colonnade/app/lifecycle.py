"""The task lifecycle verbs: ``retrain`` (a task's own parts, in place) and ``retire``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..training.data import load_task_data
from ..training.lifecycle import retire_task, retrain_task
from .transaction import writing

__all__ = ["retrain_workspace", "retire_workspace"]


def retrain_workspace(folder: str | Path, task: str, train: str | Path, reason: str,
                      val: str | Path | None = None, epochs: int | None = None,
                      fresh: bool = False, progress: bool = True, by: str | None = None,
                      sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade retrain``: train a task's own parts again on new data, commit once."""
    with writing(folder, "retrain", by=by, reason=reason, sign=sign) as tx:
        net = tx.net
        info = net.task(task)
        data = load_task_data(train, net.input_shape, classes=info.classes, val_path=val,
                              val_fraction=net.spec.train.val_fraction,
                              seed=net.spec.train.seed)
        return retrain_task(net, task, data, reason, epochs=epochs, fresh=fresh,
                            progress=progress)


def retire_workspace(folder: str | Path, task: str, reason: str, by: str | None = None,
                     sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade retire``: take a task out of service with a recorded reason."""
    with writing(folder, "retire", by=by, reason=reason, sign=sign) as tx:
        return retire_task(tx.net, task, reason)
