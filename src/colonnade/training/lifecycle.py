"""A task's life after it grew: retrained in place, or retired; each with a reason on record.

After ``unseal`` a task can be trained again, but only its *own* parts: its head, the
adapters into its head and, if it grew a column, that column and the adapters into it. A
part that another live task's closure holds is shared, and retraining it would move that
task's outputs, so the retrain is refused and those tasks are named. A sealed task is
refused too: the seal must be lifted first (with its own reason on record).

Retiring a task takes it out of service: no longer predicted, exported or counted in
costs. Its record, history and seals stay, and so do its parts, since other tasks may
read them (a column's early blocks, an adapter); the history step says which parts only
the retired task read. Both steps, and the task's accuracy before and after a retrain,
are in the history.
"""

from __future__ import annotations

from typing import Any

import torch

from ..clock import now
from ..errors import SealedError, UsageError
from ..model.guard import sealed_tasks
from ..model.network import ProgressiveNet
from .data import TaskData
from .fit import evaluate, fit_task
from .validation import accuracies, remeasure

__all__ = ["own_parts", "readers_of", "retrain_task", "retire_task"]


def own_parts(net: ProgressiveNet, task: str) -> list[str]:
    """The parts ``task`` brought and alone trains: head, head adapters, its column and
    the adapters into it (when it grew one)."""
    info = net.task(task)
    parts = [f"head:{task}"] + [f"adapter:{key}" for key, _ in net.adapters_into_head(task)]
    if info.mode == "column":
        k = info.column
        parts.insert(0, f"column:{k}")
        parts += [f"adapter:{key}" for b in range(len(net.columns[k].blocks))
                  for key, _ in net.adapters_into_block(k, b)]
    return parts


def readers_of(net: ProgressiveNet, task: str, parts: list[str]) -> dict[str, list[str]]:
    """Other live tasks whose closure holds any of ``parts``: task -> the parts it reads."""
    wanted = set(parts)
    out: dict[str, list[str]] = {}
    for other in net.live_tasks:
        if other == task:
            continue
        c = net.closure(other)
        held = ({f"column:{k}" for k in c.columns} | {f"adapter:{a}" for a in c.adapters}
                | {f"head:{c.head}"})
        shared = sorted(wanted & held)
        if shared:
            out[other] = shared
    return out


def _refuse_sealed(net: ProgressiveNet, task: str, action: str) -> None:
    entry = sealed_tasks(net).get(task)
    if entry is not None:
        raise SealedError(f"cannot {action} task {task!r}: it is sealed (seal "
                          f"v{entry.get('version')} of {entry.get('time')}); lift the seal "
                          f"first with 'colonnade unseal WS --task {task} --reason TEXT'")


def _reason(reason: str | None, action: str) -> str:
    reason = (reason or "").strip()
    if not reason:
        raise UsageError(f"to {action} a task, say why: pass --reason TEXT (kept in the "
                         f"history)")
    return reason


def _live(net: ProgressiveNet, task: str, action: str) -> None:
    if net.task(task).state != "live":
        raise UsageError(f"task {task!r} is retired, so it cannot be {action}")


def retrain_task(net: ProgressiveNet, task: str, data: TaskData, reason: str,
                 epochs: int | None = None, fresh: bool = False,
                 progress: bool = True) -> dict[str, Any]:
    """Train ``task``'s own parts again on ``data``, in place; returns the history step.

    ``fresh`` re-initialises those parts first (with the task's own seed); otherwise
    training continues from the current weights. Refused for a sealed or retired task, and
    when another live task reads any of its parts (naming those tasks).
    """
    reason = _reason(reason, "retrain")
    _live(net, task, "retrained")
    _refuse_sealed(net, task, "retrain")
    info = net.task(task)
    if data.classes != info.classes:
        raise UsageError(f"task {task!r} has {info.classes} classes, the data "
                         f"{data.classes}; retraining keeps the head, so give data with the "
                         f"same classes (or grow a new task)")
    parts = own_parts(net, task)
    readers = readers_of(net, task, parts)
    if readers:
        names = ", ".join(f"{t!r} (reads {', '.join(p)})" for t, p in readers.items())
        raise UsageError(f"cannot retrain task {task!r} in place: task{'s' * (len(readers) > 1)} "
                         f"{names} depend{'s' * (len(readers) == 1)} on its parts; grow a new "
                         f"task instead, or retire the dependent tasks first")
    before = accuracies(net, [task])[task]
    seed = net.spec.train.seed + net.tasks.index(task)
    modules = dict(net.part_modules())
    net._make_trainable(parts)  # the one choke point: refuses sealed parts
    try:
        if fresh:
            with torch.random.fork_rng(devices=[]), torch.no_grad():
                torch.manual_seed(seed)
                for part in parts:
                    for m in modules[part].modules():
                        reset = getattr(m, "reset_parameters", None)
                        if callable(reset):
                            reset()
        record = fit_task(net, task, data, net.spec.train, epochs=epochs, seed=seed,
                          progress=progress, label=f"retrain {task}")
    finally:
        net.freeze()
    acc, _ = evaluate(net, task, data.x_val, data.y_val)
    when = now()
    step = {"step": "task_retrained", "task": task, "time": when, "reason": reason,
            "parts": parts, "fresh": bool(fresh), "data": data.source,
            "epochs_run": record.epochs_run, "val_accuracy": acc}
    net.meta["history"].append(step)
    rec = net.meta["records"].setdefault(task, {})
    rec.setdefault("retrains", []).append({"time": when, "reason": reason,
                                           "previous_train": rec.get("train"),
                                           "data": data.source})
    rec["train"] = record.to_dict()
    remeasure(net, task, "retrain", before, when)
    return step


def retire_task(net: ProgressiveNet, task: str, reason: str) -> dict[str, Any]:
    """Take ``task`` out of service, keeping its record and every part others read."""
    reason = _reason(reason, "retire")
    _live(net, task, "retired again")
    _refuse_sealed(net, task, "retire")
    parts = own_parts(net, task)
    readers = readers_of(net, task, parts)
    still_read = sorted({p for shared in readers.values() for p in shared})
    net.task(task).state = "retired"
    step = {"step": "task_retired", "task": task, "time": now(), "reason": reason,
            "parts_still_read": still_read,
            "parts_idle": [p for p in parts if p not in still_read],
            "read_by": {t: p for t, p in readers.items()}}
    net.meta["history"].append(step)
    return step
