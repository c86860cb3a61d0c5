"""Workspace verbs that measure and trim adapters: ``usage`` and ``trim``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..clock import now
from ..errors import UsageError
from ..files.store import atomic_write
from ..model.network import ProgressiveNet
from ..training.data import load_for_spec
from ..training.sources import source_digest
from ..trimming.ownership import refuse_sealed
from ..trimming.trim import TrimReport, check_trim_args, trim
from ..trimming.usage import UsageReport, measure, record_usage, task_adapters
from ..views.usage_plot import PLOT_FORMATS, usage_heatmap
from .transaction import writing

__all__ = ["usage_workspace", "trim_workspace"]


def _check_plot_path(path: str | Path | None) -> None:
    if path is None:
        return
    path = Path(path)
    if path.suffix.lower().lstrip(".") not in PLOT_FORMATS:
        raise UsageError(f"{path}: the plot must end in one of "
                         f"{', '.join('.' + f for f in PLOT_FORMATS)}")
    if not path.parent.is_dir():
        raise UsageError(f"{path.parent}: no such folder for the plot")


def usage_workspace(folder: str | Path, task: str, data: str | Path,
                    plot: str | Path | None = None, noise: float = 1.0, repeats: int = 3,
                    by: str | None = None, reason: str | None = None,
                    sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade usage``: score the adapters feeding a task, record them, commit, plot."""
    _check_plot_path(plot)
    with writing(folder, "usage", by=by, reason=reason, sign=sign) as tx:
        report = _score(tx.net, task, data, noise, repeats)
    if plot is not None:
        atomic_write(plot, usage_heatmap(report, Path(plot).suffix.lower().lstrip(".")))
    return report.to_dict()


def _score(net: ProgressiveNet, task: str, data: str | Path, noise: float, repeats: int,
           ) -> UsageReport:
    info = net.task(task)
    loaded = load_for_spec(data, net.spec, classes=info.classes, class_names=info.class_names,
                           need_labels=True, split=False)
    if not task_adapters(net, task):
        raise UsageError(f"task {task!r} has no live lateral adapters, so there is nothing "
                         f"to score")
    report = measure(net, task, loaded.x, loaded.y, noise=noise, repeats=repeats,
                     seed=net.spec.train.seed)
    report.data = {"source": str(data), "sha256": source_digest(data)}
    record_usage(net, report)
    net.meta["history"].append({"step": "usage_scored", "task": task, "time": now(),
                                "data_sha256": report.data["sha256"]})
    return report


def trim_workspace(folder: str | Path, task: str, data: str | Path, max_drop: float = 0.5,
                   target_params: int | None = None, target_macs: int | None = None,
                   finetune: int = 0, train: str | Path | None = None, merge: bool = False,
                   progress: bool = True, by: str | None = None, reason: str | None = None,
                   sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade trim``: trim one task of a workspace and commit once, at the end.

    Trimming removes parts a task was trained with, so it needs a ``reason`` (recorded).
    """
    with writing(folder, "trim", by=by, reason=reason, sign=sign) as tx:
        report = _trim(tx.net, task, data, max_drop, target_params, target_macs, finetune,
                       train, merge, progress, tx.reason)
        if not report.steps:
            tx.discard()
    return report.to_dict()


def _trim(net: ProgressiveNet, task: str, data: str | Path, max_drop: float,
          target_params: int | None, target_macs: int | None, finetune: int,
          train: str | Path | None, merge: bool, progress: bool, reason: str | None,
          ) -> TrimReport:
    info = net.task(task)
    refuse_sealed(net, task)
    check_trim_args(max_drop, target_params, target_macs, finetune, train is not None)
    if reason is None:
        raise UsageError("trimming changes a task's parts, so it needs a reason; pass "
                         "--reason TEXT saying why")
    loaded = load_for_spec(data, net.spec, classes=info.classes, class_names=info.class_names,
                           need_labels=True, split=False)
    train_data = None
    if finetune:
        train_data = load_for_spec(train, net.spec, classes=info.classes,
                                   class_names=info.class_names)
    report = trim(net, task, loaded, max_drop=max_drop, target_params=target_params,
                  target_macs=target_macs, finetune=finetune, train=train_data, merge=merge,
                  progress=progress)
    return report
