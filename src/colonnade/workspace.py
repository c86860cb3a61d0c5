"""Actions on a workspace folder, one function per CLI verb.

Each loads the workspace, acts through the library, and saves atomically only when the
action succeeded, so a failure or Ctrl-C leaves the folder exactly as it was.
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import numpy as np

from .data import load_task_data
from .errors import UsageError
from .fit import EVAL_BATCH, all_task_logits, task_logits
from .growth import grow
from .network import ProgressiveNet
from .store import atomic_write, create, load, save

__all__ = ["new_workspace", "grow_workspace", "describe", "predict_file", "parameter_counts"]


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
    from . import distributed

    if nproc is not None or distributed.launched_by_torchrun():
        request = distributed.GrowRequest(str(folder), task, str(train),
                                          None if val is None else str(val), mode, on, width,
                                          classes, epochs, device, cache, cache_mb, target)
        if nproc is not None:
            return distributed.grow_distributed(request, nproc, progress=progress)
        return distributed.run_torchrun_rank(request, progress=progress)
    net = load(folder)
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
                 progress=progress, cache=cache, cache_mb=cache_mb, target=target)
    save(net, folder)
    return entry


def parameter_counts(net: ProgressiveNet) -> dict[str, int]:
    """Parameters by part kind, from the cost ledger (``numel`` of the modules)."""
    from .costs import count_params

    columns = sum(count_params(c, "column").total for c in net.columns)
    adapters = sum(count_params(a, "adapters").total for a in net.adapters.values())
    heads = sum(count_params(h, "head").total for h in net.heads.values())
    return {"columns": columns, "adapters": adapters, "heads": heads,
            "total": columns + adapters + heads}


def describe(folder: str | Path) -> dict[str, Any]:
    """What ``show`` prints: tasks, columns, heads, adapters and parameter counts."""
    from .costs import task_cost
    from .seal import sealed_tasks
    from .transfer import record as transfer_record

    net = load(folder)
    sealed = sealed_tasks(net)
    tasks = []
    for name, info in net.task_info.items():
        record = net.meta["records"].get(name, {})
        closure = net.closure(name)
        path_params = task_cost(net, name).path.params.total
        tasks.append({
            "task": name, "mode": info.mode, "column": info.column, "classes": info.classes,
            "val_accuracy": record.get("val_accuracy"),
            "closure_columns": list(closure.columns), "params_path": path_params,
            "seal": sealed[name]["version"] if name in sealed else None,
        })
    columns = [{"column": c.index, "task": c.task, "width": c.width,
                "params": sum(p.numel() for p in net.columns[c.index].parameters())}
               for c in net.column_info]
    adapters = [{"key": key, "kind": a.kind, "source": a.source, "target": a.target,
                 "state": a.state,
                 "params": sum(p.numel() for p in net.adapters[key].parameters())
                 if key in net.adapters else 0}
                for key, a in net.adapter_info.items()]
    return {
        "workspace": str(folder),
        "spec": net.spec.name,
        "input": list(net.input_shape),
        "lateral": net.spec.lateral.kind,
        "tasks": tasks,
        "columns": columns,
        "adapters": adapters,
        "parameters": parameter_counts(net),
        "seals": {t: {"version": e.get("version"), "time": e.get("time"),
                      "closure_sha256": (e.get("closure") or {}).get("sha256"),
                      "probe_accuracy": (e.get("metrics") or {}).get("accuracy")}
                  for t, e in sealed.items()},
        "transfer": transfer_record(net, sealed),
        "history": net.meta["history"],
    }


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
    net = load(folder)
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
