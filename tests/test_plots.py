"""Report figures that say what they mean: the accuracy matrix and the confusion matrices.

Outside references: matplotlib's own artist tree (the patches, texts, image data and
legend entries that it will draw) and Pillow, which must open every PNG.
"""

from __future__ import annotations

import io
import math

import matplotlib.pyplot as plt
import numpy as np
from matplotlib.patches import Rectangle
from PIL import Image

from colonnade.views.plots import (
    accuracy_figure,
    accuracy_heatmap,
    confusion_figure,
    confusion_heatmap,
)

TASKS = ["pump_a", "pump_b", "pump_c"]
# R[i][j]: trained results on and below the diagonal, before-training on the first
# superdiagonal (0.011 is what an untrained 90-class head scores), nothing above it.
R = [[0.91, 0.011, None],
     [0.91, 0.88, 0.25],
     [0.91, 0.88, 0.95]]


def _hatched_cells(ax) -> set[tuple[int, int]]:
    """(row, column) of every hatched rectangle drawn on the axes."""
    cells = set()
    for p in ax.patches:
        if isinstance(p, Rectangle) and p.get_hatch():
            x, y = p.get_xy()
            cells.add((round(y + 0.5), round(x + 0.5)))
    return cells


def test_untrained_cells_are_drawn_apart_from_trained_results():
    fig = accuracy_figure(TASKS, R)
    ax = fig.axes[0]
    assert _hatched_cells(ax) == {(0, 1), (1, 2)}  # exactly the before-training entries
    data = np.ma.masked_invalid(np.asarray(ax.images[0].get_array(), dtype=float))
    for i in range(3):
        for j in range(3):
            # The colour scale carries trained results only; the rest is masked out of it.
            assert bool(np.ma.getmaskarray(data)[i, j]) == (j > i), (i, j)
    texts = {(round(t.get_position()[1]), round(t.get_position()[0])): t.get_text()
             for t in ax.texts}
    assert texts[(0, 1)] == "0.011" and texts[(1, 2)] == "0.250"  # values still readable
    assert (0, 2) not in texts  # not applicable: no number at all
    labels = [t.get_text() for legend in fig.legends for t in legend.get_texts()]
    assert any("before training" in label for label in labels)
    assert any("not applicable" in label for label in labels)
    plt.close(fig)


def test_legend_only_for_kinds_of_cell_that_are_there():
    fig = accuracy_figure(["only"], [[0.9]])  # one task: nothing untrained to show
    assert fig.legends == [] and _hatched_cells(fig.axes[0]) == set()
    plt.close(fig)


def test_confusion_matrix_prints_every_count_with_class_names():
    matrix = [[82, 11, 6, 1], [6, 94, 0, 0], [1, 0, 99, 0], [5, 0, 0, 95]]
    names = ["normal", "bearing", "imbalance", "misalignment"]
    fig = confusion_figure(matrix, names)
    ax = fig.axes[0]
    texts = {(round(t.get_position()[1]), round(t.get_position()[0])): t.get_text()
             for t in ax.texts}
    assert texts == {(i, j): f"{matrix[i][j]:,}" for i in range(4) for j in range(4)}
    assert [t.get_text() for t in ax.get_yticklabels()] == names
    assert [t.get_text() for t in ax.get_xticklabels()] == names
    shares = np.asarray(ax.images[0].get_array(), dtype=float)
    for i, row in enumerate(matrix):  # colour: share of the true class (row-normalised)
        assert math.isclose(shares[i].sum(), 1.0) and math.isclose(shares[i, i],
                                                                    row[i] / sum(row))
    plt.close(fig)


def test_pngs_open_in_pillow():
    for data in (accuracy_heatmap(TASKS, R), confusion_heatmap([[3, 1], [0, 4]])):
        image = Image.open(io.BytesIO(data))
        image.verify()  # Pillow's own integrity check of the PNG
        assert image.format == "PNG" and min(image.size) > 100
