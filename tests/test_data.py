"""Task data checks: every bad file is refused with one sentence before anything runs."""

from __future__ import annotations

import numpy as np
import pytest

from colonnade.errors import DataError
from colonnade.training.data import load_task_data, stratified_split


def _npz(path, **arrays):
    np.savez(path, **arrays)
    return path


def _good(n=40, f=8):
    rng = np.random.default_rng(0)
    return rng.normal(size=(n, f)).astype(np.float32), np.arange(n) % 4


def test_npz_with_split_is_stratified(tmp_path):
    x, y = _good()
    d = load_task_data(_npz(tmp_path / "a.npz", x=x, y=y), (8,), seed=3)
    assert d.classes == 4 and d.n_train + d.n_val == 40
    assert sorted(np.bincount(d.y_val.numpy()).tolist()) == [2, 2, 2, 2]


def test_npz_with_its_own_validation(tmp_path):
    x, y = _good()
    d = load_task_data(_npz(tmp_path / "a.npz", x=x, y=y, x_val=x[:5], y_val=y[:5]), (8,))
    assert d.n_train == 40 and d.n_val == 5


def test_csv_with_label_column(tmp_path):
    p = tmp_path / "a.csv"
    p.write_text("f0,label,f1\n0.5,1,2\n1.5,0,3\n2.5,1,4\n3.5,0,5\n")
    d = load_task_data(p, (2,), split=False)
    assert d.x.tolist() == [[0.5, 2], [1.5, 3], [2.5, 4], [3.5, 5]]
    assert d.y.tolist() == [1, 0, 1, 0]


def test_flat_csv_rows_reshape_to_a_shaped_input(tmp_path):
    # A CSV row is flat by nature, so it may fill a shaped input in row-major order.
    p = tmp_path / "a.csv"
    p.write_text("a,b,c,d,label\n1,2,3,4,0\n5,6,7,8,1\n")
    d = load_task_data(p, (2, 2), split=False)
    assert d.x.tolist() == [[[1, 2], [3, 4]], [[5, 6], [7, 8]]]


def test_an_array_in_another_layout_is_refused_naming_both_shapes(tmp_path):
    # Issue 14 item 1: [N, 256, 3] for an input [3, 256] was silently reshaped before.
    x = np.zeros((6, 256, 3), np.float32)
    with pytest.raises(DataError, match=r"sample shape \[256, 3\], but the spec's input is \[3, 256\]"):
        load_task_data(_npz(tmp_path / "t.npz", x=x, y=np.arange(6) % 2), (3, 256))
    with pytest.raises(DataError, match=r"sample shape \[2, 64\], but the spec's input is \[128\]"):
        load_task_data(_npz(tmp_path / "f.npz", x=np.zeros((6, 2, 64), np.float32), y=np.arange(6) % 2), (128,))


def test_stratified_split_keeps_every_class_on_both_sides():
    y = np.array([0] * 10 + [1] * 3)
    tr, va = stratified_split(y, 0.2, 0)
    assert set(y[tr]) == {0, 1} and set(y[va]) == {0, 1}
    assert len(set(tr) & set(va)) == 0 and len(tr) + len(va) == 13


def _cases(tmp_path):
    x, y = _good()
    bad_x = x.copy()
    bad_x[3, 2] = np.nan
    (tmp_path / "empty.csv").write_text("")
    (tmp_path / "nolabel.csv").write_text("a,b\n1,2\n")
    (tmp_path / "text.csv").write_text("a,label\nx,1\n")
    (tmp_path / "junk.npz").write_bytes(b"not a zip file")
    return [
        (_npz(tmp_path / "shape.npz", x=x[:, :5], y=y), "sample shape [5], but the spec's input"),
        (_npz(tmp_path / "nan.npz", x=bad_x, y=y), "holds 1 non-finite value"),
        (_npz(tmp_path / "neg.npz", x=x, y=y - 1), "negative labels (the smallest is -1)"),
        (_npz(tmp_path / "len.npz", x=x, y=y[:-3]), "x has 40 samples but y has 37 labels"),
        (_npz(tmp_path / "float.npz", x=x, y=y + 0.5), "whole-number class labels"),
        (_npz(tmp_path / "noy.npz", x=x), "no array named 'y'"),
        (_npz(tmp_path / "nox.npz", y=y), "no array named 'x'"),
        (_npz(tmp_path / "zero.npz", x=x[:0], y=y[:0]), "x holds no samples"),
        (_npz(tmp_path / "one.npz", x=x, y=y * 0), "y holds a single class"),
        (tmp_path / "junk.npz", "cannot read as .npz"),
        (tmp_path / "empty.csv", "the file is empty"),
        (tmp_path / "nolabel.csv", "no column named 'label'"),
        (tmp_path / "text.csv", "line 2, column 'a' holds 'x', not a number"),
        (tmp_path / "missing.npz", "no such data file"),
        (tmp_path, "holds files but no class folders"),
        (tmp_path / "a.txt", "no such data file"),
    ]


def test_bad_data_gets_one_sentence(tmp_path):
    for path, message in _cases(tmp_path):
        with pytest.raises(DataError) as err:
            load_task_data(path, (8,))
        assert message in str(err.value), (path, str(err.value))
        assert "\n" not in str(err.value)


def test_class_count_must_match_the_task(tmp_path):
    x, y = _good()
    with pytest.raises(DataError, match="outside 0..2 for a task of 3 classes"):
        load_task_data(_npz(tmp_path / "a.npz", x=x, y=y), (8,), classes=3)


def test_unknown_suffix(tmp_path):
    p = tmp_path / "a.txt"
    p.write_text("1,2")
    with pytest.raises(DataError, match="unknown data format .txt"):
        load_task_data(p, (8,))


def test_pickled_npz_is_refused(tmp_path):
    # numpy refuses object arrays when allow_pickle=False (numpy.load documentation).
    p = tmp_path / "obj.npz"
    np.savez(p, x=np.array([{"a": 1}], dtype=object), y=np.array([0]))
    with pytest.raises(DataError, match="cannot read as .npz"):
        load_task_data(p, (8,))
