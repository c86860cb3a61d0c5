"""The continual-learning record follows every change to a task (trim, merge, fine-tune,
retrain), and the history keeps the figure before and after.

Outside references: scikit-learn's bundled digits as tasks, and
``sklearn.metrics.accuracy_score`` for the accuracy on the stored validation rows.
"""

from __future__ import annotations

import pytest
from sklearn.metrics import accuracy_score
from test_trim import TASKS, grown, held_out

from colonnade.evidence import transfer
from colonnade.training.fit import task_logits
from colonnade.training.validation import validation
from colonnade.trimming.trim import trim


def _accuracy(net, task):
    x, y = validation(net, task)
    # Source: sklearn.metrics.accuracy_score.
    return accuracy_score(y.numpy(), task_logits(net, task, x).argmax(1).numpy())


def test_trim_updates_the_record_and_keeps_both_figures():
    net = grown()
    task = "perm2"
    at_growth = transfer.record(net)["R"][-1][2]
    report = trim(net, task, held_out(TASKS[2]), max_drop=100.0)
    assert report.steps
    now = _accuracy(net, task)
    assert now != at_growth  # the trim moved it, so a stale record would show
    rec = transfer.record(net)
    assert rec["R"][-1][2] == pytest.approx(now, abs=1e-12)
    assert rec["ACC"] == pytest.approx(sum(rec["R"][-1]) / 3, abs=1e-12)
    step = net.meta["history"][-1]
    assert step["step"] == "task_remeasured" and step["task"] == task
    assert step["val_accuracy_before"] == at_growth
    assert step["val_accuracy"] == pytest.approx(now, abs=1e-12)
    record = net.meta["records"][task]
    assert record["val_accuracy"] == pytest.approx(now, abs=1e-12)
    assert record["val_accuracy_at_growth"] == at_growth
