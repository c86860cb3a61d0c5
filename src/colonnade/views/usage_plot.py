"""The adapter-usage heat map (``colonnade usage --plot``), as image bytes.

Drawn with matplotlib's Agg backend; the verb that asked for it writes the file.
"""

from __future__ import annotations

import io

import torch

from ..trimming.usage import UsageReport

__all__ = ["usage_heatmap", "PLOT_FORMATS"]

PLOT_FORMATS = ("png", "svg", "pdf")


def _source_label(sources: list[int]) -> str:
    if len(sources) == 1:
        return f"column {sources[0]}"
    return "columns " + "+".join(str(s) for s in sources)


def usage_heatmap(report: UsageReport, fmt: str = "png") -> bytes:
    """A heat map of APS, source column against layer, as image bytes in ``fmt``.

    APS is normalised over the adapters into each layer, as in the paper's analysis, so
    layers compare; each cell also shows the varying share and the ablation loss rise.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = sorted({_source_label(a.sources) for a in report.adapters},
                  key=lambda s: [int(t) for t in s.split()[1].split("+")])
    cols = sorted({a.layer for a in report.adapters},
                  key=lambda s: (s == "head", int(s.split()[1]) if s != "head" else 0))
    grid = torch.full((len(rows), len(cols)), float("nan"))
    for a in report.adapters:
        grid[rows.index(_source_label(a.sources)), cols.index(a.layer)] = a.aps
    fig, ax = plt.subplots(figsize=(3.2 + 1.5 * len(cols), 1.8 + 0.8 * len(rows)))
    try:
        image = ax.imshow(grid.numpy(), cmap="viridis", vmin=0.0, vmax=1.0, aspect="auto")
        ax.set_xticks(range(len(cols)), cols)
        ax.set_yticks(range(len(rows)), rows)
        ax.set_xlabel(f"target layer of task {report.task!r}")
        ax.set_ylabel("source")
        for a in report.adapters:
            r, c = rows.index(_source_label(a.sources)), cols.index(a.layer)
            ax.text(c, r, f"APS {a.aps:.2f}\nshare {a.varying_share:.2f}\n"
                          f"score {a.score:+.3f}", ha="center", va="center",
                    fontsize=7, color="white" if a.aps < 0.6 else "black")
        fig.colorbar(image, ax=ax, label="perturbation sensitivity (APS)")
        ax.set_title(f"adapter use, {report.samples} samples\n(APS: Rusu et al. 2016; score: "
                     f"loss rise, mean-ablated)", fontsize=8)
        fig.tight_layout()
        buf = io.BytesIO()
        fig.savefig(buf, format=fmt)
    finally:
        plt.close(fig)
    return buf.getvalue()
