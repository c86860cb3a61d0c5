"""Task data checks: every bad file is refused with one sentence before anything runs."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from colonnade.errors import DataError, UsageError
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


def test_narrow_types_are_converted_with_a_note_and_wide_values_refused(tmp_path):
    # Issue 14 item 8. float32's largest value is 3.4028235e38 (IEEE 754 single precision).
    y = np.arange(6) % 2
    for dtype in (np.int16, np.float16, np.uint8):
        d = load_task_data(_npz(tmp_path / "n.npz", x=np.ones((6, 2), dtype), y=y), (2,),
                           split=False)
        assert d.x.dtype == torch.float32 and d.x.tolist() == [[1.0, 1.0]] * 6
        assert d.notes == [f"converted {np.dtype(dtype).name} values to float32"]
    wide = np.ones((6, 2))
    wide[4, 1] = 1e39
    with pytest.raises(DataError, match=r"x\[4\]: feature 1 holds 1e\+39, beyond the float32"):
        load_task_data(_npz(tmp_path / "w.npz", x=wide, y=y), (2,))
    p = tmp_path / "w.csv"
    p.write_text("volts,amps,label\n1,2,0\n3,4e39,1\n")
    with pytest.raises(DataError, match=r"line 3: column 'amps' holds 4e\+39, beyond"):
        load_task_data(p, (2,))


def test_huge_class_counts_are_refused_before_anything_is_allocated(tmp_path):
    import tracemalloc

    from colonnade.model.network import ProgressiveNet
    from colonnade.model.spec import parse_spec

    x = np.zeros((3, 2), np.float32)
    path = _npz(tmp_path / "a.npz", x=x, y=np.array([0, 1, 10**9]))
    tracemalloc.start()
    with pytest.raises(DataError, match="holds label 1000000000, but labels run 0..C-1 with at "
                                        "most 65536 classes"):
        load_task_data(path, (2,))
    with pytest.raises(DataError, match="1000000000000 classes is more than colonnade allows"):
        load_task_data(_npz(tmp_path / "b.npz", x=x, y=np.array([0, 1, 1])), (2,),
                       classes=10**12)
    net = ProgressiveNet(parse_spec({"input": [2], "column": [{"dense": 4}]}))
    with pytest.raises(UsageError, match="at most 65536 classes, got 1000000000"):
        net.add_column("t", 10**9)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 50 << 20  # a head of 10^9 classes would need 4 GB per input feature
