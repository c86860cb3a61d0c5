"""Suspicious training data: refused where training cannot be meaningful, warned about
where its figures would mislead; and what a log file gets instead of progress bars.

Outside references: numpy's ``bincount`` for the class counts the sentences must name,
and a terminal stand-in (a stream whose ``isatty()`` is true) for what tqdm draws.
"""

from __future__ import annotations

import io
import warnings

import numpy as np
import pytest
import torch
from conftest import snapshot

from colonnade.cli import main
from colonnade.errors import DataError
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.checks import FEW_ROWS, DataWarning
from colonnade.training.data import TaskData
from colonnade.training.fit import EpochProgress
from colonnade.training.growth import grow

SPEC = {"input": [4], "column": [{"dense": 6}, {"act": "relu"}],
        "lateral": {"kind": "linear"}, "train": {"epochs": 2, "batch_size": 8}}


def _data(y, y_val=None, classes=None):
    g = torch.Generator().manual_seed(0)
    y = torch.tensor(y)
    y_val = torch.tensor(y_val if y_val is not None else [0, 1, 2])
    classes = classes or int(max(y.max(), y_val.max())) + 1
    return TaskData(torch.randn(len(y), 4, generator=g), y,
                    torch.randn(len(y_val), 4, generator=g), y_val, classes, "rows.npz")


def test_a_class_without_training_rows_is_refused():
    net = ProgressiveNet(parse_spec(SPEC))
    data = _data([0, 2] * 10, y_val=[0, 2])
    assert np.bincount(data.y.numpy(), minlength=3)[1] == 0  # Source: numpy's count
    with pytest.raises(DataError, match=r"class 1 of 3 has no training rows"):
        grow(net, "t", data, progress=False)
    assert net.tasks == []  # refused before anything grew
    with pytest.warns(DataWarning, match="class 1 has no training rows"):
        grow(net, "t", data, progress=False, classes_given=True)


def test_a_class_without_training_rows_is_refused_by_the_cli(tmp_path, capsys):
    (tmp_path / "s.yaml").write_text("input: [4]\ncolumn: [{dense: 6}]\ntrain: {epochs: 1}\n")
    ws = tmp_path / "ws"
    assert main(["new", str(tmp_path / "s.yaml"), "-o", str(ws)]) == 0
    np.savez(tmp_path / "d.npz", x=np.zeros((20, 4), np.float32), y=np.array([0, 2] * 10))
    before = snapshot(ws)
    capsys.readouterr()
    assert main(["grow", str(ws), "--task", "t", "--train", str(tmp_path / "d.npz"),
                 "--quiet"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "class 1 of 3 has no training rows" in err[0]
    assert snapshot(ws) == before


def test_thin_classes_and_a_validation_gap_are_warned_about():
    net = ProgressiveNet(parse_spec(SPEC))
    y = [0] * 10 + [1] * 10 + [2] * (FEW_ROWS - 1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        entry = grow(net, "t", _data(y, y_val=[0, 1, 0, 1]), progress=False)
    said = [str(w.message) for w in caught if issubclass(w.category, DataWarning)]
    assert any(f"fewer than {FEW_ROWS} training rows ({FEW_ROWS - 1})" in s for s in said)
    assert any("validation data has no rows of class 2" in s for s in said)
    assert entry["data_warnings"] == said


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_is_one_line_per_epoch_when_not_a_terminal():
    log = io.StringIO()
    bar = EpochProgress("train t", 3, stream=log)
    for e in range(1, 4):
        bar.epoch(e, 0.5, 0.75)
    bar.close()
    text = log.getvalue()
    assert "\r" not in text
    assert text.splitlines() == [f"train t: epoch {e}/3, train loss 0.5000, validation "
                                 f"accuracy 0.7500" for e in range(1, 4)]
    tty = _Terminal()
    bar = EpochProgress("train t", 3, stream=tty)
    bar.epoch(1, 0.5, 0.75)
    bar.close()
    assert "\r" in tty.getvalue()  # Source: tqdm redraws its line with carriage returns


def test_auto_growth_labels_its_phases_and_says_when_the_column_misses(capsys):
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(SPEC))
    y = [0, 1, 2] * 8
    grow(net, "first", _data(y), progress=False)
    g = torch.Generator().manual_seed(5)  # labels unrelated to x: no model reaches 1.0
    data = TaskData(torch.randn(24, 4, generator=g), torch.tensor(y),
                    torch.randn(9, 4, generator=g), torch.tensor([0, 1, 2] * 3), 3, "noise")
    entry = grow(net, "second", data, mode="auto", target=1.0, progress=True)
    err = capsys.readouterr().err
    assert "auto: trying a head: epoch 1/2" in err
    assert "auto: growing a column: epoch 1/2" in err
    auto = entry["auto"]
    assert auto["chose"] == "column" and auto["column_met_target"] is False
    assert auto["column_short_by"] == pytest.approx(1.0 - entry["val_accuracy"], abs=1e-12)
    assert "the column also missed the target" in auto["reason"]


def test_cli_prints_a_warning_as_one_line(tmp_path, capsys):
    (tmp_path / "s.yaml").write_text("input: [4]\ncolumn: [{dense: 6}]\ntrain: {epochs: 1}\n")
    ws = tmp_path / "ws"
    assert main(["new", str(tmp_path / "s.yaml"), "-o", str(ws)]) == 0
    np.savez(tmp_path / "d.npz", x=np.zeros((20, 4), np.float32), y=np.array([0, 2] * 10))
    capsys.readouterr()
    assert main(["grow", str(ws), "--task", "t", "--train", str(tmp_path / "d.npz"),
                 "--classes", "3", "--quiet"]) == 0
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert any(ln.startswith("colonnade: warning: ") and "class 1 has no training rows" in ln
               for ln in err), err
    assert not any("warnings.warn" in ln for ln in err)
