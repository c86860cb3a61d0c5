"""Trim a task before it is sealed: prune low-use adapters, merge the rest, within a tolerance.

Progressive Neural Networks (Rusu et al. 2016, Sec. 5) found that much of the lateral
capacity goes unused and could be pruned, but did not prune. ``trim`` does, greedily:
score the adapters feeding the task by ablation (usage.py), remove the one whose removal
costs least, re-validate on the data, and keep going while the task has lost at most
``max_drop`` accuracy points against where it started (and until a size target is met).
Optionally the task's own parts are fine-tuned after pruning to win accuracy back, and
``merge`` folds the adapters left in one layer into one joint low-rank adapter (merge.py)
at the smallest rank that stays within the same tolerance and saves parameters.

Trust: a sealed task is refused; adapters that another task's output depends on are
never touched (an adapter belongs to the closure of every task that reaches it); every
change is a growth step in the history; a failure or Ctrl-C puts the network back as it
was, and the workspace is saved once, at the end.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import torch

from ..clock import now
from ..costing import costs
from ..errors import UsageError
from ..model.guard import guard
from ..model.network import ProgressiveNet
from ..training.data import TaskData
from ..training.fit import evaluate, fit_task
from ..training.validation import accuracies, remeasure
from .editor import AdapterEditor
from .merge import fit_joint, install_joint, uninstall_joint
from .ownership import fold_targets, own_parts, owned_adapters, param_count, refuse_sealed
from .usage import ablation_scores, adapter_means, measure, record_usage, task_adapters

__all__ = ["TrimStep", "TrimReport", "trim", "check_trim_args"]

_EPS = 1e-12  # accuracy comparisons: fractions of the sample count, compared exactly


@dataclass
class TrimStep:
    step: str  # "adapter_pruned" | "adapters_merged" | "task_finetuned"
    adapters: list[str]
    accuracy: float
    loss: float
    params_saved: int = 0
    macs_saved: int = 0
    detail: dict[str, Any] = field(default_factory=dict)


@dataclass
class TrimReport:
    task: str
    samples: int
    max_drop: float  # accuracy points
    accuracy_before: float
    loss_before: float
    accuracy_after: float = math.nan
    loss_after: float = math.nan
    params_before: int = 0
    params_after: int = 0
    macs_before: int = 0
    macs_after: int = 0
    lateral_params_before: int = 0  # of the adapters feeding the task directly
    lateral_params_after: int = 0
    columns_before: list[int] = field(default_factory=list)
    columns_after: list[int] = field(default_factory=list)
    target: dict[str, int] | None = None
    target_met: bool | None = None
    steps: list[TrimStep] = field(default_factory=list)
    kept: dict[str, str] = field(default_factory=dict)  # adapter -> why it stays
    merges_rejected: list[dict[str, Any]] = field(default_factory=list)
    stopped: str = ""

    @property
    def params_saved(self) -> int:
        return self.params_before - self.params_after

    @property
    def macs_saved(self) -> int:
        return self.macs_before - self.macs_after

    @property
    def columns_dropped(self) -> list[int]:
        return sorted(set(self.columns_before) - set(self.columns_after))

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out.update(params_saved=self.params_saved, macs_saved=self.macs_saved,
                   columns_dropped=self.columns_dropped,
                   accuracy_change_points=100.0 * (self.accuracy_after - self.accuracy_before))
        return out


# ----------------------------------------------------------------------------- checks
def check_trim_args(max_drop: float, target_params: int | None, target_macs: int | None,
                finetune: int, has_train: bool) -> None:
    if not (isinstance(max_drop, (int, float)) and math.isfinite(max_drop) and 0 <= max_drop
            <= 100):
        raise UsageError(f"--max-drop must be a number of accuracy points in [0, 100], got "
                         f"{max_drop}")
    if target_params is not None and target_macs is not None:
        raise UsageError("give --target-params or --target-macs, not both")
    for name, value in (("--target-params", target_params), ("--target-macs", target_macs)):
        if value is not None and (not isinstance(value, int) or value < 0):
            raise UsageError(f"{name} must be a count of at least 0, got {value}")
    if not isinstance(finetune, int) or finetune < 0:
        raise UsageError(f"--finetune must be a number of epochs of at least 0, got {finetune}")
    if finetune and not has_train:
        raise UsageError("--finetune needs the task's training data; pass --train FILE")
    if has_train and not finetune:
        raise UsageError("--train is read only for fine-tuning; add --finetune EPOCHS or "
                         "drop --train")


# ----------------------------------------------------------------------------- editing
# ----------------------------------------------------------------------------- trimming
def _path_cost(net: ProgressiveNet, task: str) -> tuple[int, int]:
    path = costs.task_cost(net, task).path
    return path.params.total, path.macs


def _target_met(report: TrimReport, net: ProgressiveNet) -> bool:
    if report.target is None:
        return False
    params, macs = _path_cost(net, report.task)
    if "params" in report.target:
        return params <= report.target["params"]
    return macs <= report.target["macs"]


def _lateral_params(net: ProgressiveNet, task: str) -> int:
    return sum(param_count(net.adapters[k]) for k, _, _ in task_adapters(net, task))


def _within(acc: float, report: TrimReport) -> bool:
    return acc >= report.accuracy_before - report.max_drop / 100.0 - _EPS


def _prune_pass(net: ProgressiveNet, editor: AdapterEditor, report: TrimReport, owned: list[str],
                x: torch.Tensor, y: torch.Tensor, folds: dict[str, tuple[str, torch.nn.Module]],
                tune: _Tuner | None = None) -> None:
    """Remove adapters, cheapest first by (mean) ablation, while within tolerance.

    Each round re-scores the live adapters and removes the cheapest one that keeps the
    task within tolerance; where the target layer is the task's own, the adapter's mean
    output on the data goes into that layer's bias. When none fits and fine-tuning is on,
    the cheapest is removed anyway and the task's own parts fine-tuned; that is kept only
    if it is back within tolerance, else both are undone and trimming stops.
    """
    layer_of = {k: layer for k, layer, _ in task_adapters(net, report.task)}
    while not _target_met(report, net):
        live = [k for k in owned if k in net.adapters]
        if not live:
            return
        means = adapter_means(net, report.task, x, [k for k in live if layer_of[k] in folds])
        _, scores = ablation_scores(net, report.task, x, y, live, means)

        def fold(key: str, means: dict[str, torch.Tensor] = means,
                 ) -> tuple[torch.nn.Module, torch.Tensor] | None:
            return (folds[layer_of[key]][1], means[key]) if key in means else None

        order = sorted(live, key=lambda k: (scores[k][1], scores[k][0], k))
        accepted = False
        for key in order:
            step = _pruned_step(net, key, scores[key], key in means)
            module = editor.prune(key, fold(key))
            acc, loss = evaluate(net, report.task, x, y)
            if _within(acc, report):
                step.accuracy, step.loss = acc, loss
                report.steps.append(step)
                accepted = True
                break
            editor.unprune(key, module)
        if accepted:
            continue
        if tune is None:
            return
        key = order[0]
        step = _pruned_step(net, key, scores[key], key in means)
        module = editor.prune(key, fold(key))
        saved = tune.snapshot()
        acc, loss = tune.run()
        if not _within(acc, report):
            tune.restore(saved)
            editor.unprune(key, module)
            return
        step.accuracy, step.loss = acc, loss
        step.detail["finetuned_epochs"] = tune.epochs
        report.steps.append(step)
        report.steps.append(TrimStep("task_finetuned", [], acc, loss, detail={
            "epochs": tune.epochs, "parts": tune.live(), "after_pruning": key}))


def _pruned_step(net: ProgressiveNet, key: str, score: tuple[float, float], folded: bool,
                 ) -> TrimStep:
    info, module = net.adapter_info[key], net.adapters[key]
    return TrimStep("adapter_pruned", [key], math.nan, math.nan, param_count(module),
                    costs.adapter_macs(module),
                    {"sources": list(info.sources), "target": info.target,
                     "mean_folded_into_bias": folded, "score_loss_rise": score[1],
                     "score_accuracy_drop": score[0]})


class _Tuner:
    """Fine-tunes the task's own live parts on its training data (fit.fit_task)."""

    def __init__(self, net: ProgressiveNet, task: str, parts: list[str], train: TaskData,
                 epochs: int, x: torch.Tensor, y: torch.Tensor, progress: bool) -> None:
        self.net, self.task, self.parts, self.train = net, task, parts, train
        self.epochs, self.x, self.y, self.progress = epochs, x, y, progress

    def live(self) -> list[str]:
        return [p for p in self.parts
                if not p.startswith("adapter:") or p.partition(":")[2] in self.net.adapters]

    def snapshot(self) -> dict[str, dict[str, torch.Tensor]]:
        modules = dict(self.net.part_modules())
        return {p: {k: v.detach().clone() for k, v in modules[p].state_dict().items()}
                for p in self.live()}

    def restore(self, saved: dict[str, dict[str, torch.Tensor]]) -> None:
        modules = dict(self.net.part_modules())
        with torch.no_grad():
            for p, state in saved.items():
                modules[p].load_state_dict(state)

    def run(self) -> tuple[float, float]:
        net = self.net
        net._make_trainable(self.live())  # the one choke point; refuses sealed parts
        try:
            seed = net.spec.train.seed + net.tasks.index(self.task)
            fit_task(net, self.task, self.train, net.spec.train, epochs=self.epochs,
                     seed=seed, progress=self.progress)
        finally:
            net.freeze()
        return evaluate(net, self.task, self.x, self.y)


def _merge_pass(net: ProgressiveNet, report: TrimReport, owned: list[str],
                x: torch.Tensor, y: torch.Tensor) -> None:
    """Fold each layer's remaining single-source adapters into one joint adapter."""
    by_layer: dict[str, list[str]] = {}
    for key, layer, _ in task_adapters(net, report.task):
        if key in owned and len(net.adapter_sources(key)) == 1:
            # An adapter reading an adopted column's tap joins too, with its own shape
            # bridge (merge.py); a layer has at most one (only column 0 is adopted).
            by_layer.setdefault(layer, []).append(key)
    for layer, keys in by_layer.items():
        if len(keys) < 2 or _target_met(report, net):
            continue
        fit = fit_joint(net, report.task, keys, x)
        cheapest = max((r for r in range(1, fit.full_rank + 1)
                        if fit.params(r) < fit.params_replaced), default=0)
        if cheapest == 0:
            report.merges_rejected.append({"adapters": keys, "layer": layer, "reason":
                                           "no rank saves parameters"})
            continue
        macs_before = sum(costs.adapter_macs(net.adapters[k]) for k in keys)

        def trial(rank: int, fit=fit) -> tuple[float, float]:  # noqa: ANN001
            _, undo = install_joint(net, fit, rank)
            try:
                return evaluate(net, report.task, x, y)
            finally:
                uninstall_joint(net, undo)

        acc, loss = trial(cheapest)
        if not _within(acc, report):
            report.merges_rejected.append({
                "adapters": keys, "layer": layer, "rank": cheapest,
                "error": fit.error(cheapest), "accuracy": acc,
                "reason": "even the largest rank that saves parameters loses too much "
                          "accuracy"})
            continue
        lo, hi, best = 1, cheapest, (cheapest, acc, loss)
        while lo < hi:  # the smallest rank within tolerance (accuracy rises with rank)
            mid = (lo + hi) // 2
            a, lss = trial(mid)
            if _within(a, report):
                hi, best = mid, (mid, a, lss)
            else:
                lo = mid + 1
        rank, acc, loss = best
        before_acc = evaluate(net, report.task, x, y)[0]
        key, _ = install_joint(net, fit, rank, {"error": fit.error(rank)})
        module = net.adapters[key]
        report.steps.append(TrimStep(
            "adapters_merged", keys, acc, loss, fit.params_replaced - param_count(module),
            macs_before - costs.adapter_macs(module),
            {"into": key, "rank": rank, "full_rank": fit.full_rank, "error": fit.error(rank),
             "accuracy_change_points": 100.0 * (acc - before_acc), "layer": layer,
             "sources": list(fit.sources),
             **({"tap": fit.tap_name} if fit.tap is not None else {})}))


def trim(net: ProgressiveNet, task: str, data: TaskData, max_drop: float = 0.5,
         target_params: int | None = None, target_macs: int | None = None,
         finetune: int = 0, train: TaskData | None = None, merge: bool = False,
         progress: bool = False) -> TrimReport:
    """Prune (and with ``merge``, merge) the adapters feeding ``task``, in memory.

    ``data`` (its ``x``, ``y``: every sample) is what accuracy is validated on;
    ``max_drop`` is in accuracy points against the start; ``target_params`` /
    ``target_macs`` stop once the task's path is that small; ``finetune`` epochs train the
    task's own parts on ``train`` after pruning. On any failure the net is put back.
    """
    net.task(task)
    refuse_sealed(net, task)
    check_trim_args(max_drop, target_params, target_macs, finetune, train is not None)
    x, y = data.x, data.y
    if x.shape[0] == 0 or y.numel() != x.shape[0]:
        raise UsageError("trimming needs labelled data to validate on; pass --data FILE with "
                         "arrays x and y")
    owned, kept = owned_adapters(net, task)
    if not owned:
        why = "it has no live lateral adapters" if not kept else (
            "every adapter feeding it is shared with another task")
        raise UsageError(f"nothing to trim for task {task!r}: {why}")
    guard(net, [f"adapter:{k}" for k in owned], "trim")
    parts = own_parts(net, task) if finetune else []
    folds = fold_targets(net, task)
    guard(net, [part for part, _ in folds.values()], "trim")
    acc0, loss0 = evaluate(net, task, x, y)
    val_before = accuracies(net, [task])[task]
    params0, macs0 = _path_cost(net, task)
    target = ({"params": target_params} if target_params is not None else
              {"macs": target_macs} if target_macs is not None else None)
    report = TrimReport(task, int(x.shape[0]), float(max_drop), acc0, loss0,
                        params_before=params0, macs_before=macs0,
                        lateral_params_before=_lateral_params(net, task),
                        columns_before=list(net.closure(task).columns), target=target,
                        kept=kept)
    editor = AdapterEditor(net, task, parts + [part for part, _ in folds.values()])
    tune = _Tuner(net, task, parts, train, finetune, x, y, progress) if finetune else None
    try:
        _prune_pass(net, editor, report, owned, x, y, folds, tune)
        if merge:
            _merge_pass(net, report, owned, x, y)
        report.accuracy_after, report.loss_after = evaluate(net, task, x, y)
        report.params_after, report.macs_after = _path_cost(net, task)
        report.lateral_params_after = _lateral_params(net, task)
        report.columns_after = list(net.closure(task).columns)
        report.target_met = _target_met(report, net) if target else None
        report.stopped = _why_stopped(report, owned, net)
        _record(net, report, data, val_before)
    except BaseException:
        editor.restore()
        raise
    return report


def _why_stopped(report: TrimReport, owned: list[str], net: ProgressiveNet) -> str:
    if report.target_met:
        return "the target was reached"
    left = [k for k, _, _ in task_adapters(net, report.task)]
    if not left:
        return "no lateral adapter feeds the task any more"
    if not owned_adapters(net, report.task)[0]:
        return "every adapter left is shared with another task"
    return (f"removing any further adapter would lose more than {report.max_drop:g} "
            f"accuracy points")


def _record(net: ProgressiveNet, report: TrimReport, data: TaskData,
            val_before: float | None) -> None:
    """Every change is a growth step; the task's accuracy on its stored validation data
    (the continual-learning record) and its usage scores are measured again afterwards."""
    when = now()
    for step in report.steps:
        entry = {"step": step.step, "task": report.task, "time": when,
                 "adapters": list(step.adapters), "accuracy": step.accuracy,
                 "loss": step.loss, "params_saved": step.params_saved,
                 "macs_saved": step.macs_saved, **step.detail}
        net.meta["history"].append(entry)
    if not report.steps:
        return
    record = net.meta["records"].setdefault(report.task, {})
    record.setdefault("trims", []).append({
        "time": when, "data": data.source, "samples": report.samples,
        "max_drop": report.max_drop, "accuracy_before": report.accuracy_before,
        "accuracy_after": report.accuracy_after, "params_saved": report.params_saved,
        "macs_saved": report.macs_saved, "columns_dropped": report.columns_dropped})
    remeasure(net, report.task, ", ".join(dict.fromkeys(s.step for s in report.steps)),
              val_before, when)
    net.meta.get("usage", {}).pop(report.task, None)
    if task_adapters(net, report.task):
        usage = measure(net, report.task, data.x, data.y, seed=net.spec.train.seed)
        usage.data = {"source": data.source}
        record_usage(net, usage)
