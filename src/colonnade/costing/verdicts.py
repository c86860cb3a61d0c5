"""Verdicts: whether each task, grown and projected, fits a device; and priced options.

A verdict compares, for each task, what a device needs once the network is grown
through that task: weight memory for every parameter and floating buffer so far at the
deployed dtype (the device holds the whole network), activation memory for the task's
own batch-1 path, and latency estimated as the path's MACs over the device's sustained
MAC rate (a lower bound: it ignores memory traffic and elementwise work). The options
re-project the same future tasks (``sizing.project``) under other growth choices.
"""

from __future__ import annotations

import importlib.util
from dataclasses import dataclass

from ..errors import UsageError
from ..model.layers import check_width
from ..model.network import ProgressiveNet
from .costs import DTYPE_BYTES, NetworkCost
from .hardware import HardwareProfile
from .sizing import Projection, default_width, project

__all__ = ["Need", "Verdict", "verdicts", "first_break", "Option", "price_options",
           "trim_available", "trimmed_fraction"]


# ----------------------------------------------------------------------------- verdicts
@dataclass(frozen=True)
class Need:
    """What a device needs to run one task once the network is grown through it."""

    weight_bytes: int
    activation_bytes: int
    latency_ms: float
    macs: int


@dataclass(frozen=True)
class Verdict:
    task: str
    future: bool
    need: Need
    over: dict[str, float]  # budget name -> need / budget, for each budget exceeded

    @property
    def fits(self) -> bool:
        return not self.over


def _need(params: int, float_buffers: int, activation: int, macs: int, dtype: str,
          rate: float) -> Need:
    size = DTYPE_BYTES[dtype]
    return Need((params + float_buffers) * size, activation * size, macs / rate * 1000.0, macs)


def _judge(task: str, future: bool, need: Need, profile: HardwareProfile) -> Verdict:
    limits = profile.budgets()
    values = {"weight_memory": need.weight_bytes, "activation_memory": need.activation_bytes,
              "latency": need.latency_ms}
    over = {k: values[k] / limits[k] for k in limits if values[k] > limits[k]}
    return Verdict(task, future, need, over)


def verdicts(base: NetworkCost, projection: Projection | None, profile: HardwareProfile,
             dtype: str | None = None) -> list[Verdict]:
    """A verdict per existing task (in growth order), then per projected task."""
    dtype = dtype or profile.dtype
    out, params, buffers = [], 0, 0
    for t in base.tasks:
        params += t.added.total
        buffers += t.added.float_buffers
        need = _need(params, buffers, t.path.activation_elements, t.path.macs, dtype,
                     profile.mac_rate)
        out.append(_judge(t.task, False, need, profile))
    for p in projection.tasks if projection else []:
        need = _need(p.network.params, p.network.float_buffers, p.activation_elements,
                     p.path.macs, dtype, profile.mac_rate)
        out.append(_judge(p.task, True, need, profile))
    return out


def first_break(rows: list[Verdict]) -> Verdict | None:
    return next((v for v in rows if not v.fits), None)


# ----------------------------------------------------------------------------- options
@dataclass(frozen=True)
class Option:
    """One way to make growth fit, with its projected effect."""

    name: str
    what: str
    status: str  # "available"; "pending" (needs a feature not in colonnade); "bound" (no
    # measurement yet, so the figure is the most the option could give)
    first_break: str | None  # the first task that still breaks, None if all fit
    last: Need | None  # what the last projected task needs under this option
    note: str = ""


def trimmed_fraction(net: ProgressiveNet, base: NetworkCost) -> float | None:
    """The share of lateral parameters past trims removed from the tasks they trimmed.

    From the history's ``adapter_pruned`` and ``adapters_merged`` steps (written by
    trim, each with the adapter parameters it saved), over the trimmed tasks' adapters
    before trimming (still live plus saved). None when no task has been trimmed.
    """
    saved: dict[str, int] = {}
    for step in net.meta.get("history") or []:
        if isinstance(step, dict) and step.get("step") in ("adapter_pruned", "adapters_merged"):
            task = step.get("task")
            saved[task] = saved.get(task, 0) + int(step.get("params_saved") or 0)
    left = {t.task: t.added.adapters for t in base.tasks}
    total_saved = sum(v for t, v in saved.items() if t in left)
    before = sum(left[t] + v for t, v in saved.items() if t in left)
    if total_saved <= 0 or before <= 0:
        return None
    return min(1.0, total_saved / before)


def trim_available() -> bool:
    """Whether adapter trimming (prune and merge) exists in this colonnade."""
    return importlib.util.find_spec("colonnade.trimming.trim") is not None


def price_options(net: ProgressiveNet, base: NetworkCost, n: int, profile: HardwareProfile,
                  width: float | None = None, classes: int | None = None) -> list[Option]:
    """Narrower columns, head-only growth, trimming adapters, a lower-precision dtype."""
    if n <= 0:
        return []
    w = float(width) if width is not None else default_width(net)

    def run(label: str, what: str, status: str = "available", note: str = "",
            dtype: str | None = None, **kw) -> Option:
        proj = project(net, n, classes=classes, base=base, **kw)
        rows = verdicts(base, proj, profile, dtype)
        brk = first_break(rows)
        return Option(label, what, status, brk.task if brk else None,
                      rows[-1].need if rows else None, note)

    options = []
    for factor in (0.75, 0.5, 0.25):
        nw = w * factor
        try:
            check_width(net.spec, nw)
        except UsageError:
            continue  # a layer would have no units left at this width
        options.append(run(f"width {nw:g}", f"grow the future columns at width {nw:g} "
                           f"({factor:.0%} of {w:g})", width=nw))
    if net.columns:
        options.append(run("head only", "grow future tasks as heads on the newest column "
                           "(no new column; accuracy not projected)", mode="head"))
    none = net.spec.lateral.model_copy(update={"kind": "none"})
    rate = trimmed_fraction(net, base)
    if not trim_available():
        options.append(run("trim adapters", "drop the lateral adapters of future columns",
                           status="pending", width=w, lateral=none,
                           note="trimming adapters is pending until the trim feature "
                                "lands; this is its bound: future columns with no lateral "
                                "adapters at all"))
    elif rate is None:
        options.append(run("trim adapters", "trim the lateral adapters of future columns",
                           status="bound", width=w, lateral=none,
                           note="no task has been trimmed yet, so this is the bound (no "
                                "future adapters at all); run 'colonnade trim' on a task to "
                                "measure what trimming saves here"))
    else:
        options.append(run("trim adapters", f"trim future adapters as past trims did "
                           f"(they removed {rate:.0%} of the lateral parameters)",
                           status="available", width=w, keep=1.0 - rate,
                           note="parameters and MACs of future adapters scaled by the "
                                "measured rate; earlier columns stay on the path and peak "
                                "activations are as untrimmed, so this errs high"))
    for dtype in ("fp16", "int8"):
        if DTYPE_BYTES[dtype] < DTYPE_BYTES[profile.dtype]:
            options.append(run(f"dtype {dtype}", f"deploy at {dtype} instead of "
                               f"{profile.dtype}", dtype=dtype, width=w,
                               note="accuracy at this precision is not checked here"
                               + ("; int8 needs quantisation scales, not counted"
                                  if dtype == "int8" else "")))
    return options
