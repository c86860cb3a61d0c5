"""Checks for the synthetic inspection-station demo data (examples/inspection_data.py)."""

from __future__ import annotations

import importlib.util
import pathlib

import numpy as np

_PATH = pathlib.Path(__file__).resolve().parents[1] / "examples" / "inspection_data.py"
_spec = importlib.util.spec_from_file_location("inspection_data", _PATH)
inspection = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(inspection)


def test_images_are_balanced_in_range_and_reproducible():
    x, y = inspection.images(30, inspection.DEFECTS, np.random.default_rng(0))
    assert x.shape == (30, 3, 32, 32) and x.dtype == np.float32
    assert 0.0 <= x.min() and x.max() <= 1.0
    assert np.bincount(y).tolist() == [10, 10, 10]
    again, _ = inspection.images(30, inspection.DEFECTS, np.random.default_rng(0))
    assert np.array_equal(x, again)


def test_each_defect_leaves_its_mark():
    rng = np.random.default_rng(1)
    x, y = inspection.images(60, inspection.DEFECTS, rng)
    # A scratch is a bright line: brighter maxima than parts without one.
    assert x[y == 1].max(axis=(1, 2, 3)).mean() > x[y == 0].max(axis=(1, 2, 3)).mean() + 0.05
    # An oil stain tints the part brown: red above blue where it lies.
    xs, ys = inspection.images(60, inspection.STAIN, np.random.default_rng(2))
    red_minus_blue = (xs[:, 0] - xs[:, 2]).max(axis=(1, 2))
    assert red_minus_blue[ys == 1].mean() > red_minus_blue[ys == 0].mean() + 0.1
