"""Usage scores: how much each lateral adapter feeding a task contributes, on task data.

Progressive Neural Networks (Rusu et al. 2016, arXiv:1606.04671, Sec. 5) observed that
only part of the new capacity is used and measured it with the Average Perturbation
Sensitivity (APS): inject Gaussian noise at one point of the architecture and see how
much performance drops. colonnade scores every live adapter into the task's column
blocks and into its head three ways:

* **ablation**: the change of accuracy and of mean cross-entropy when that adapter's
  output is replaced by zeros, and **mean ablation**, by its mean over the data per
  output channel (what pruning costs when that mean is folded into the target layer's
  bias, which ``trim`` does where it may);
* **contribution share**: the mean over samples of ||adapter output|| / ||whole
  pre-activation||, the pre-activation being the target layer's weighted output (its
  bias included) plus every lateral into it; and the **varying share**, the same ratio
  after removing each term's mean over the data, because a constant offset acts like a
  bias and carries nothing about the input (on digits, an unrelated column's adapter
  had the larger raw share through its offset alone, and the smaller varying share);
* **perturbation**, in the spirit of APS: Gaussian noise with each input feature's
  (channel's) variance on the data, times ``noise``, is added to the adapter's input
  only, so the source column's own path is untouched; we report the accuracy drop and
  loss rise averaged over ``repeats`` draws, and ``aps``, the loss rise normalised over
  the adapters into the same layer (as the paper normalises over columns at one layer;
  the normalisation is recalled from memory, the noise scale is our choice).

Everything runs through forward hooks that exist only while a score is measured, so
the network's own computation is untouched (the tests check bit-identical logits).
``score`` (the mean-ablation loss rise) orders adapters for pruning.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
import torch.nn.functional as F

from ..clock import now
from ..errors import DataError, UsageError
from ..model.network import ProgressiveNet
from ..training.fit import EVAL_BATCH

__all__ = ["AdapterUsage", "UsageReport", "task_adapters", "measure", "ablation_scores",
           "adapter_means", "record_usage"]


@dataclass
class AdapterUsage:
    """The scores of one adapter; accuracy figures are fractions, losses in nats."""

    key: str
    kind: str
    sources: list[int]
    target: str  # "column K block B" or "head TASK"
    layer: str  # "block B" or "head": the heat map's column
    params: int
    ablation_accuracy_drop: float = 0.0
    ablation_loss_rise: float = 0.0
    mean_ablation_accuracy_drop: float = 0.0
    mean_ablation_loss_rise: float = 0.0
    share: float = 0.0
    varying_share: float = 0.0
    perturb_accuracy_drop: float = 0.0
    perturb_loss_rise: float = 0.0
    aps: float = 0.0

    @property
    def score(self) -> float:
        """What pruning costs in loss, its mean kept as a bias: the order, lowest first."""
        return self.mean_ablation_loss_rise

    def to_dict(self) -> dict[str, Any]:
        return {**asdict(self), "score": self.score}


@dataclass
class UsageReport:
    task: str
    samples: int
    accuracy: float
    loss: float
    noise: float
    repeats: int
    adapters: list[AdapterUsage] = field(default_factory=list)
    data: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"task": self.task, "samples": self.samples, "accuracy": self.accuracy,
                "loss": self.loss, "noise": self.noise, "repeats": self.repeats,
                "data": dict(self.data), "adapters": [a.to_dict() for a in self.adapters]}


# ----------------------------------------------------------------------------- helpers
def task_adapters(net: ProgressiveNet, task: str) -> list[tuple[str, str, tuple[int, int] | None]]:
    """Live adapters into the task's column blocks and head: (key, layer, (column, block)).

    Only these feed the task directly; adapters into earlier columns belong to the tasks
    of those columns (and to every task that reaches them).
    """
    info = net.task(task)
    out: list[tuple[str, str, tuple[int, int] | None]] = []
    for b in range(len(net.columns[info.column].blocks)):
        out += [(key, f"block {b}", (info.column, b))
                for key, _ in net.adapters_into_block(info.column, b)]
    out += [(key, "head", None) for key, _ in net.adapters_into_head(task)]
    return out


@contextlib.contextmanager
def _hooks(registrations: list[Callable[[], Any]]) -> Iterator[None]:
    """Register hooks for the duration of a block, and always remove them."""
    handles = []
    try:
        for register in registrations:
            handles.append(register())
        yield
    finally:
        for h in handles:
            h.remove()


@torch.no_grad()
def _run(net: ProgressiveNet, task: str, x: torch.Tensor, y: torch.Tensor,
         after_batch: Callable[[], None] | None = None) -> tuple[float, float]:
    """Accuracy and mean cross-entropy in eval mode, in the fixed evaluation batches."""
    was_training = net.training
    net.eval()
    device = net.device
    correct, loss = 0, 0.0
    try:
        for i in range(0, x.shape[0], EVAL_BATCH):
            xb, yb = x[i:i + EVAL_BATCH].to(device), y[i:i + EVAL_BATCH].to(device)
            logits = net(xb, task=task)
            correct += int((logits.argmax(1) == yb).sum())
            loss += float(F.cross_entropy(logits.double(), yb, reduction="sum"))
            if after_batch is not None:
                after_batch()
    finally:
        net.train(was_training)
    n = max(int(x.shape[0]), 1)
    return correct / n, loss / n


def _zero_output(module: torch.nn.Module, inputs: Any, output: torch.Tensor) -> torch.Tensor:
    return torch.zeros_like(output)


def _constant_output(mean: torch.Tensor) -> Callable[..., torch.Tensor]:
    def hook(module: torch.nn.Module, inputs: Any, output: torch.Tensor) -> torch.Tensor:
        shape = [1] * output.dim()
        shape[1] = output.shape[1]
        return mean.to(output.dtype).reshape(shape).expand_as(output).to(output.device)
    return hook


@torch.no_grad()
def adapter_means(net: ProgressiveNet, task: str, x: torch.Tensor, keys: list[str],
                  ) -> dict[str, torch.Tensor]:
    """Each adapter's mean output per channel (over samples and positions), float64.

    A per-channel constant is exactly what the target layer's bias can carry.
    """
    sums: dict[str, torch.Tensor] = {}
    counts: dict[str, int] = {}

    def grab(key: str):
        def hook(module, inputs, output):
            o = output.detach().double()
            dims = [d for d in range(o.dim()) if d != 1]
            sums[key] = sums[key] + o.sum(dims) if key in sums else o.sum(dims)
            counts[key] = counts.get(key, 0) + o.numel() // o.shape[1]
        return hook

    with _hooks([lambda m=net.adapters[k], k=k: m.register_forward_hook(grab(k))
                 for k in keys]):
        _run(net, task, x, torch.zeros(x.shape[0], dtype=torch.int64))
    return {k: (sums[k] / counts[k]).cpu() for k in keys}


def _check_data(net: ProgressiveNet, task: str, x: torch.Tensor, y: torch.Tensor) -> None:
    if x.shape[0] == 0:
        raise DataError("the usage data holds no samples")
    if y.numel() != x.shape[0]:
        raise DataError("usage scores need one label per sample")
    net.task(task)


# ----------------------------------------------------------------------------- scores
def ablation_scores(net: ProgressiveNet, task: str, x: torch.Tensor, y: torch.Tensor,
                    keys: list[str] | None = None,
                    means: dict[str, torch.Tensor] | None = None,
                    ) -> tuple[tuple[float, float], dict[str, tuple[float, float]]]:
    """Baseline (accuracy, loss) and, per adapter, (accuracy drop, loss rise) when its
    output is zeroed, or, for keys in ``means``, replaced by that per-channel mean."""
    _check_data(net, task, x, y)
    keys = [k for k, _, _ in task_adapters(net, task)] if keys is None else keys
    means = means or {}
    acc, loss = _run(net, task, x, y)
    out = {}
    for key in keys:
        hook = _constant_output(means[key]) if key in means else _zero_output
        with _hooks([lambda m=net.adapters[key], f=hook: m.register_forward_hook(f)]):
            a, lo = _run(net, task, x, y)
        out[key] = (acc - a, lo - loss)
    return (acc, loss), out


def measure(net: ProgressiveNet, task: str, x: torch.Tensor, y: torch.Tensor,
            noise: float = 1.0, repeats: int = 3, seed: int = 0) -> UsageReport:
    """Score every live adapter feeding ``task`` on labelled data ``x``, ``y``."""
    _check_data(net, task, x, y)
    if not (noise > 0 and math.isfinite(noise)):
        raise UsageError(f"the noise scale must be a positive number, got {noise}")
    if repeats < 1:
        raise UsageError(f"repeats must be at least 1, got {repeats}")
    feeding = task_adapters(net, task)
    report = UsageReport(task, int(x.shape[0]), 0.0, 0.0, float(noise), int(repeats))
    if not feeding:
        report.accuracy, report.loss = _run(net, task, x, y)
        return report

    # Two clean passes with hooks that only look: the first takes the mean output of
    # every adapter and target layer and each adapter input's moments, the second the
    # per-sample shares, raw and with those means removed.
    info = net.task(task)
    targets: dict[str, list[str]] = {}
    for key, layer, _ in feeding:
        targets.setdefault(layer, []).append(key)
    outputs: dict[str, torch.Tensor] = {}  # this batch: adapter key or layer -> output
    sums: dict[str, torch.Tensor] = {}
    moments: dict[tuple[str, int], list[torch.Tensor]] = {}
    counts: dict[tuple[str, int], int] = {}
    share_sum = {k: 0.0 for k, _, _ in feeding}
    varying_sum = {k: 0.0 for k, _, _ in feeding}

    def keep_out(name: str):
        def hook(module, inputs, output):
            outputs[name] = output.detach().double()
        return hook

    def keep_moments(key: str):
        # Per input (a joint adapter that reads a tap has two: its columns and its tap).
        def hook(module, inputs):
            for i, h in enumerate(inputs):
                h = h.detach().double()
                dims = [d for d in range(h.dim()) if d != 1]
                s, s2 = h.sum(dims), (h * h).sum(dims)
                if (key, i) in moments:
                    moments[(key, i)][0] += s
                    moments[(key, i)][1] += s2
                else:
                    moments[(key, i)] = [s, s2]
                counts[(key, i)] = counts.get((key, i), 0) + h.numel() // h.shape[1]
        return hook

    def add_sums() -> None:
        for name, out in outputs.items():
            total = out.sum(0)
            sums[name] = sums[name] + total if name in sums else total

    def add_shares() -> None:
        n = report.samples
        for layer, keys in targets.items():
            z = outputs[layer] + sum(outputs[k] for k in keys)
            z_mean = (sums[layer] + sum(sums[k] for k in keys)) / n
            zn = z.flatten(1).norm(dim=1).clamp_min(1e-300)
            zc = (z - z_mean).flatten(1).norm(dim=1).clamp_min(1e-300)
            for k in keys:
                o = outputs[k]
                share_sum[k] += float((o.flatten(1).norm(dim=1) / zn).sum())
                varying_sum[k] += float(((o - sums[k] / n).flatten(1).norm(dim=1) / zc).sum())

    looks: list[Callable[[], Any]] = []
    for key, _, _ in feeding:
        looks.append(lambda m=net.adapters[key], key=key: m.register_forward_hook(keep_out(key)))
    for layer in targets:
        if layer == "head":
            target_module = net.heads[task]
        else:
            target_module = net.columns[info.column].blocks[int(layer.split()[1])].weighted
        looks.append(lambda m=target_module, layer=layer: m.register_forward_hook(
            keep_out(layer)))
    moment_hooks = [lambda m=net.adapters[key], key=key: m.register_forward_pre_hook(
        keep_moments(key)) for key, _, _ in feeding]
    with _hooks(looks + moment_hooks):
        report.accuracy, report.loss = _run(net, task, x, y, add_sums)
    with _hooks(looks):
        _run(net, task, x, y, add_shares)

    scores = {}
    for key, layer, _ in feeding:
        a = net.adapter_info[key]
        scores[key] = AdapterUsage(key, a.kind, list(net.adapter_sources(key)), a.target,
                                   layer, sum(p.numel() for p in net.adapters[key].parameters()),
                                   share=share_sum[key] / report.samples,
                                   varying_share=varying_sum[key] / report.samples)

    # Ablation: the adapter's output replaced by zeros.
    keys = [k for k, _, _ in feeding]
    _, ablated = ablation_scores(net, task, x, y, keys)
    for key, (da, dl) in ablated.items():
        scores[key].ablation_accuracy_drop, scores[key].ablation_loss_rise = da, dl
    _, ablated = ablation_scores(net, task, x, y, keys, adapter_means(net, task, x, keys))
    for key, (da, dl) in ablated.items():
        scores[key].mean_ablation_accuracy_drop, scores[key].mean_ablation_loss_rise = da, dl

    # Perturbation: noise scaled to each input feature's variance on the data.
    gen = torch.Generator().manual_seed(seed)
    for key, _, _ in feeding:
        stds = []
        for i in range(sum(1 for k, _ in moments if k == key)):
            s, s2 = moments[(key, i)]
            mean = s / counts[(key, i)]
            stds.append((s2 / counts[(key, i)] - mean * mean).clamp_min(0.0).sqrt())

        def add_noise(module, inputs, stds=stds):
            noisy = []
            for h, std in zip(inputs, stds, strict=True):
                shape = [1] * h.dim()
                shape[1] = h.shape[1]
                scale = (noise * std).to(h.dtype).reshape(shape).to(h.device)
                eps = torch.randn(h.shape, generator=gen, dtype=h.dtype).to(h.device)
                noisy.append(h + eps * scale)
            return tuple(noisy)

        drops, rises = [], []
        for _ in range(repeats):
            with _hooks([lambda m=net.adapters[key], f=add_noise:
                         m.register_forward_pre_hook(f)]):
                a, lo = _run(net, task, x, y)
            drops.append(report.accuracy - a)
            rises.append(lo - report.loss)
        scores[key].perturb_accuracy_drop = sum(drops) / repeats
        scores[key].perturb_loss_rise = sum(rises) / repeats

    for keys in targets.values():
        total = sum(max(scores[k].perturb_loss_rise, 0.0) for k in keys)
        for k in keys:
            scores[k].aps = max(scores[k].perturb_loss_rise, 0.0) / total if total > 0 else 0.0
    report.adapters = [scores[k] for k, _, _ in feeding]
    return report


# ----------------------------------------------------------------------------- records
def record_usage(net: ProgressiveNet, report: UsageReport) -> None:
    """Keep the latest scores in the manifest: per task, and on each adapter's record.

    Only records change; no tensor does, so every seal stays exact.
    """
    when = now()
    entry = report.to_dict()
    entry["time"] = when
    entry["adapters"] = {a.key: {k: v for k, v in a.to_dict().items() if k != "key"}
                         for a in report.adapters}
    net.meta.setdefault("usage", {})[report.task] = entry
    for a in report.adapters:
        net.adapter_info[a.key].extra["usage"] = {
            "task": report.task, "time": when, "score": a.score, "share": a.share,
            "varying_share": a.varying_share,
            "ablation_accuracy_drop": a.ablation_accuracy_drop,
            "ablation_loss_rise": a.ablation_loss_rise,
            "mean_ablation_loss_rise": a.mean_ablation_loss_rise, "aps": a.aps,
            "perturb_loss_rise": a.perturb_loss_rise}

