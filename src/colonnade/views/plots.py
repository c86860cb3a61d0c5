"""Figures for the report, drawn with matplotlib's Agg backend (no display needed).

Each function takes the plain data of the ledger and returns PNG bytes, so the report
can write them as files and inline them as base64 alike. Colours are from the Okabe &
Ito 2008 palette (readable for colour-blind readers); projected tasks are drawn hatched
and lighter so they never pass for measured ones.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.patches import Patch, Rectangle  # noqa: E402
from matplotlib.ticker import (  # noqa: E402
    EngFormatter,
    FuncFormatter,
    MaxNLocator,
    MultipleLocator,
)

__all__ = ["params_per_task", "macs_per_task", "projected_growth", "accuracy_heatmap",
           "accuracy_figure", "confusion_heatmap", "confusion_figure", "PART_COLOURS"]

PART_COLOURS = {"column": "#0072B2", "adapters": "#E69F00", "head": "#009E73"}
BUDGET = "#D55E00"
BEFORE_TRAINING = "#d9d9d9"  # hatched: a measurement, but not of a trained task
NOT_APPLICABLE = "#f2f2f2"
_STYLE = {
    "figure.dpi": 110, "savefig.dpi": 110, "font.size": 9, "axes.titlesize": 11,
    "axes.titleweight": "bold", "axes.labelsize": 9, "axes.spines.top": False,
    "axes.spines.right": False, "axes.grid": True, "axes.grid.axis": "y", "grid.alpha": 0.3,
    "legend.frameon": False, "legend.fontsize": 8, "font.family": "DejaVu Sans",
}


def _png(fig: Any) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _bytes_axis(ax: Any, top: float) -> str:
    """Ticks at round multiples of one binary unit; returns the unit for the label."""
    unit, name = 1, "B"
    for size, label in ((2**30, "GiB"), (2**20, "MiB"), (2**10, "KiB")):
        if top >= 2 * size:
            unit, name = size, label
            break
    raw = top / unit / 5 if top > 0 else 1
    step = next(m * 10 ** math.floor(math.log10(raw)) for m in (1, 2, 2.5, 5, 10)
                if m * 10 ** math.floor(math.log10(raw)) >= raw)
    ax.yaxis.set_major_locator(MultipleLocator(step * unit))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v / unit:g}"))
    return name


def _labels(ax: Any, names: Sequence[str]) -> None:
    ax.set_xticks(range(len(names)))
    rotate = len(names) > 4 or max((len(n) for n in names), default=0) > 10
    ax.set_xticklabels(names, rotation=35 if rotate else 0, ha="right" if rotate else "center")


def _stacked(ax: Any, names: list[str], parts: list[dict[str, int]], future: list[bool]) -> None:
    bottom = [0] * len(names)
    for part, colour in PART_COLOURS.items():
        values = [p.get(part, 0) for p in parts]
        for i, v in enumerate(values):
            ax.bar(i, v, bottom=bottom[i], color=colour, alpha=0.45 if future[i] else 1.0,
                   hatch="//" if future[i] else None, edgecolor="white", linewidth=0.6,
                   label=part if i == 0 else None)
        bottom = [b + v for b, v in zip(bottom, values, strict=True)]
    _labels(ax, names)


def _per_task_bars(tasks: list[dict[str, Any]], projected: list[dict[str, Any]], key: str,
                   ylabel: str, title: str) -> bytes:
    """One bar per task (projected ones hatched), stacked by part from ``key``."""
    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(7.5, 3.6))
        names = [t["task"] for t in tasks] + [p["task"] for p in projected]
        parts = [t[key] for t in tasks] + [p[key] for p in projected]
        future = [False] * len(tasks) + [True] * len(projected)
        _stacked(ax, names, parts, future)
        ax.yaxis.set_major_formatter(EngFormatter(sep=" "))
        ax.set_ylabel(ylabel)
        ax.set_xlabel("task, in growth order" + (" (hatched: projected)" if projected else ""))
        ax.set_title(title)
        ax.legend(loc="upper left")
        return _png(fig)


def params_per_task(tasks: list[dict[str, Any]], projected: list[dict[str, Any]]) -> bytes:
    """Parameters each task added, stacked by part; projected tasks hatched."""
    return _per_task_bars(tasks, projected, "params_added_by_part",
                          "parameters added (count)", "Parameters each task brings, by part")


def macs_per_task(tasks: list[dict[str, Any]], projected: list[dict[str, Any]]) -> bytes:
    """MACs of each task's inference path at batch 1, stacked by part."""
    return _per_task_bars(tasks, projected, "macs_by_part", "MACs per inference (batch 1)",
                          "Compute on each task's path (FLOPs = 2 x MACs)")


def projected_growth(series: dict[str, Any]) -> bytes:
    """Weight memory, activation memory and latency per task against the budget lines.

    ``series`` holds ``labels`` (task names), ``future`` (bools), ``weight``,
    ``activation`` (bytes), ``latency`` (ms, or None), ``dtype``, ``budgets`` (or None:
    no device) and ``breaks`` (index of the first task over budget, or None).
    """
    labels, future = series["labels"], series["future"]
    panels = [("weight", "weight memory", True), ("activation", "activation memory (peak)",
                                                    True)]
    if series.get("latency") is not None:
        panels.append(("latency", "latency estimate", False))
    with plt.rc_context(_STYLE):
        fig, axes = plt.subplots(1, len(panels), figsize=(4.0 * len(panels), 3.4))
        x = list(range(1, len(labels) + 1))
        n_now = future.count(False)
        for ax, (key, title, is_bytes) in zip(axes, panels, strict=True):
            values = series[key]
            if n_now:
                # above the projected line, so the last grown task keeps its filled marker
                ax.plot(x[:n_now], values[:n_now], "o-", color="#0072B2", label="grown",
                        zorder=3)
            if len(x) > n_now:
                start = max(n_now - 1, 0)
                ax.plot(x[start:], values[start:], "o--", color="#56B4E9",
                        markerfacecolor="white", label="projected")
            budgets = series.get("budgets")
            top = max(values, default=0)
            if budgets:
                limit = budgets[{"weight": "weight_memory", "activation": "activation_memory",
                                 "latency": "latency"}[key]]
                ax.axhline(limit, color=BUDGET, linewidth=1.4, label="device budget")
                top = max(top, limit)
            ax.set_ylim(0, (top or 1) * 1.15)
            brk = series.get("breaks")
            if brk is not None:
                ax.axvline(brk + 1, color="#777777", linestyle=":", linewidth=1,
                           label="first over budget")
            unit = _bytes_axis(ax, (top or 1) * 1.15) if is_bytes else "ms"
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.set_xlabel("tasks grown (count)")
            what = title.split(" (")[0]
            ax.set_ylabel(f"{what} ({unit})" + (f" at {series['dtype']}" if is_bytes else ""))
            ax.set_title(title[0].upper() + title[1:], fontsize=10)
        axes[0].legend(loc="upper left")
        device = series.get("device")
        fig.suptitle("Growth against " + (f"the budget of {device}" if device
                                           else "the task count (no device profile)"),
                     fontsize=11, fontweight="bold", y=1.02)
        fig.tight_layout()
        return _png(fig)


def accuracy_heatmap(tasks: list[str], R: list[list[float | None]]) -> bytes:
    """The accuracy matrix as PNG bytes (see ``accuracy_figure``)."""
    with plt.rc_context({**_STYLE, "axes.grid": False}):
        return _png(accuracy_figure(tasks, R))


def accuracy_figure(tasks: list[str], R: list[list[float | None]]) -> Any:
    """The accuracy matrix R[i][j]: accuracy on task j after growing task i.

    Only trained results (j <= i) are coloured by value. R[i-1][i], task i measured on the
    untrained start of its own parts, is drawn hatched on grey with its value, and cells
    that do not exist (task j has no parts yet) are plain grey; both have a legend entry,
    so a before-training 0.011 never reads as a trained result.
    """
    n = len(tasks)
    with plt.rc_context({**_STYLE, "axes.grid": False}):  # also when called on its own
        size = max(3.4, 0.62 * n + 2.0)
        fig, ax = plt.subplots(figsize=(size + 1.2, size + 0.4), layout="constrained")
        trained = [[math.nan if j > i or R[i][j] is None else float(R[i][j])
                    for j in range(n)] for i in range(n)]
        cmap = plt.get_cmap("viridis").with_extremes(bad=NOT_APPLICABLE)
        im = ax.imshow(trained, cmap=cmap, vmin=0.0, vmax=1.0)
        font = 8 if n <= 8 else 6.5
        before = absent = False
        for i in range(n):
            for j in range(n):
                v = R[i][j] if j < len(R[i]) else None
                if j <= i and v is not None:
                    ax.text(j, i, f"{v:.3f}", ha="center", va="center", fontsize=font,
                            color="black" if v > 0.6 else "white")
                    continue
                if j == i + 1 and v is not None:
                    before = True
                    ax.add_patch(Rectangle((j - 0.5, i - 0.5), 1, 1, facecolor=BEFORE_TRAINING,
                                           hatch="///", edgecolor="#9a9a9a", linewidth=0))
                    ax.text(j, i, f"{v:.3f}", ha="center", va="center", fontsize=font,
                            color="#333333", style="italic",
                            bbox={"facecolor": BEFORE_TRAINING, "edgecolor": "none",
                                  "pad": 0.6})
                else:
                    absent = True
        ax.set_xticks(range(n))
        ax.set_yticks(range(n))
        ax.set_xticklabels(tasks, rotation=35, ha="right")
        ax.set_yticklabels(tasks)
        ax.set_xlabel("evaluated on task")
        ax.set_ylabel("after growing task")
        ax.set_title("Accuracy matrix R (validation)")
        bar = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
        bar.set_label("accuracy of trained tasks (fraction correct)")
        handles = []
        if before:
            handles.append(Patch(facecolor=BEFORE_TRAINING, hatch="///", edgecolor="#9a9a9a",
                                 label="before training (task's untrained start)"))
        if absent:
            handles.append(Patch(facecolor=NOT_APPLICABLE, edgecolor="#bbbbbb",
                                 label="not applicable (task not grown yet)"))
        if handles:
            fig.legend(handles=handles, loc="outside lower center", ncol=len(handles),
                       fontsize=7.5)
        return fig


def confusion_heatmap(matrix: list[list[int]], classes: Sequence[str] | None = None,
                      title: str = "Confusion on the probe") -> bytes:
    """A confusion matrix as PNG bytes (see ``confusion_figure``)."""
    with plt.rc_context({**_STYLE, "axes.grid": False}):
        return _png(confusion_figure(matrix, classes, title))


def confusion_figure(matrix: list[list[int]], classes: Sequence[str] | None = None,
                     title: str = "Confusion on the probe") -> Any:
    """A confusion matrix (rows true class, columns predicted) with the count in each cell.

    Colour is the share of the true class (row-normalised), so a rare class that is
    mostly missed stands out as much as a common one; the counts are printed as they are.
    """
    n = len(matrix)
    names = list(classes) if classes else [str(c) for c in range(n)]
    with plt.rc_context({**_STYLE, "axes.grid": False}):
        size = max(2.4, 0.42 * n + 1.3)
        fig, ax = plt.subplots(figsize=(size + 0.9, size))
        share = []
        for row in matrix:
            total = sum(row)
            share.append([c / total if total else math.nan for c in row])
        cmap = plt.get_cmap("Blues").with_extremes(bad=NOT_APPLICABLE)
        im = ax.imshow(share, cmap=cmap, vmin=0.0, vmax=1.0)
        font = 8 if n <= 8 else (6.5 if n <= 14 else 5)
        for i in range(n):
            for j in range(n):
                s = share[i][j]
                ax.text(j, i, f"{matrix[i][j]:,}", ha="center", va="center", fontsize=font,
                        color="white" if not math.isnan(s) and s > 0.55 else "black")
        ax.set_xticks(range(n))
        ax.set_yticks(range(n))
        rotate = n > 4 or max((len(c) for c in names), default=0) > 4
        ax.set_xticklabels(names, rotation=45 if rotate else 0, ha="right" if rotate else "center")
        ax.set_yticklabels(names)
        ax.set_xlabel("predicted class")
        ax.set_ylabel("true class")
        ax.set_title(title, fontsize=10)
        bar = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
        bar.set_label("share of the true class", fontsize=8)
        return fig
