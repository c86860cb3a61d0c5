"""The continual-learning record: the accuracy matrix R and the transfer metrics.

Lopez-Paz & Ranzato 2017 (Gradient Episodic Memory, arXiv:1706.08840, Sec. 2), for T
tasks learnt in order, R[i][j] the test accuracy on task j after learning task i, and
b[i] the accuracy on task i of a randomly initialised network (1-based in the paper):

    ACC = 1/T     sum_{i=1..T}   R[T][i]
    BWT = 1/(T-1) sum_{i=1..T-1} R[T][i] - R[i][i]
    FWT = 1/(T-1) sum_{i=2..T}   R[i-1][i] - b[i]

How colonnade fills them in for a progressive network (our definitions):

* R[i][j], j <= i: accuracy on task j's validation data after growth step i. Each
  task's validation set is kept in the workspace (``validation.safetensors``) for this.
* R[i-1][i]: task i *before* it is trained: the network after step i-1 with task i's
  parts freshly initialised, the very state its training starts from. Later entries
  R[i][j], j > i + 1, do not exist: task j has no parts yet.
* b[i]: the same network with every earlier part re-initialised by its layers' own
  initialisers (and norm statistics reset), task i's new parts unchanged. So R[i-1][i]
  and b[i] differ only in whether the earlier columns were trained, and FWT says what
  the trained columns give a new task before it learns. Without laterals it is 0.

Frozen closures cannot move, so BWT is exactly 0.0 over tasks whose closures were not
trimmed; over sealed tasks it is exactly 0.0 by the guard. A trim, merge, fine-tune or
retrain of a task records its accuracy again (a ``task_remeasured`` step); that figure
replaces the task's entry in the newest row, so ACC and BWT show the task as it is.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

__all__ = ["average_accuracy", "backward_transfer", "forward_transfer", "accuracy_matrix",
           "record", "record_of"]

GROWTH_STEPS = ("column_added", "head_added")
# Steps that re-measure a task after a change to its parts (trim, merge, fine-tune,
# retrain), written by training.validation.remeasure.
CHANGE_STEPS = ("task_remeasured",)

Matrix = Sequence[Sequence[float | None]]


def _mean(values: list[float | None]) -> float | None:
    if not values or any(v is None for v in values):
        return None
    return sum(values) / len(values)  # type: ignore[arg-type]


def average_accuracy(R: Matrix) -> float | None:
    """ACC: mean accuracy over all tasks after the last one was learnt."""
    T = len(R)
    return _mean([R[T - 1][i] for i in range(T)]) if T else None


def backward_transfer(R: Matrix, tasks: Iterable[int] | None = None) -> float | None:
    """BWT, over every earlier task or only over the indices in ``tasks``."""
    T = len(R)
    chosen = range(T - 1) if tasks is None else sorted(i for i in set(tasks) if i < T - 1)
    diffs = [None if R[T - 1][i] is None or R[i][i] is None else R[T - 1][i] - R[i][i]
             for i in chosen]
    return _mean(diffs)  # type: ignore[arg-type]


def forward_transfer(R: Matrix, b: Sequence[float | None]) -> float | None:
    """FWT: accuracy before learning a task, against a random network's, tasks 2..T."""
    T = len(R)
    diffs = [None if R[i - 1][i] is None or b[i] is None else R[i - 1][i] - b[i]
             for i in range(1, T)]
    return _mean(diffs)  # type: ignore[arg-type]


# ----------------------------------------------------------------------------- the record
def accuracy_matrix(net: Any) -> tuple[list[str], list[list[float | None]],
                                                  list[float | None]]:
    """Tasks in growth order, R (None where undefined or unmeasured) and b, from history."""
    return _matrix(net.meta.get("history", []), net.task_info)


def _matrix(history: list[Any], tasks_now: Iterable[str],
            ) -> tuple[list[str], list[list[float | None]], list[float | None]]:
    tasks_now = set(tasks_now)
    history = [e for e in history if isinstance(e, dict) and e.get("task") in tasks_now]
    steps = [e for e in history if e.get("step") in GROWTH_STEPS]
    tasks = [e["task"] for e in steps]
    T = len(tasks)
    R: list[list[float | None]] = [[None] * T for _ in range(T)]
    b: list[float | None] = [None] * T
    index = {t: n for n, t in enumerate(tasks)}
    i = -1
    for e in history:
        if e.get("step") in GROWTH_STEPS:
            i += 1
            row = e.get("val_accuracies") or {}
            for j in range(i + 1):
                R[i][j] = row.get(tasks[j])
            if i > 0:
                R[i - 1][i] = e.get("before_training")
            b[i] = e.get("random_init")
        elif e.get("step") in CHANGE_STEPS and 0 <= index.get(e["task"], T) <= i:
            # A change after growth step i: row i holds the task as it is now; the figure
            # it replaces stays in the history (the step's val_accuracy_before).
            R[i][index[e["task"]]] = e.get("val_accuracy")
    return tasks, R, b


def record(net: Any, sealed: Iterable[str] = ()) -> dict[str, Any]:
    """What ``show`` prints: R, b and ACC, BWT (also over ``sealed`` tasks only), FWT.

    ``net`` is a ProgressiveNet (only its history and task names are read).
    """
    return record_of(net.meta.get("history", []), net.task_info, sealed)


def record_of(history: list[Any], tasks_now: Iterable[str], sealed: Iterable[str] = (),
              ) -> dict[str, Any]:
    """The record from a history and the tasks in the network now; no torch needed."""
    tasks, R, b = _matrix(history, tasks_now)
    index = {t: i for i, t in enumerate(tasks)}
    sealed_idx = [index[t] for t in sealed if t in index]
    return {
        "tasks": tasks,
        "R": R,
        "random_init": b,
        "ACC": average_accuracy(R),
        "BWT": backward_transfer(R) if len(tasks) > 1 else None,
        "BWT_sealed": (backward_transfer(R, sealed_idx)
                       if any(i < len(tasks) - 1 for i in sealed_idx) else None),
        "FWT": forward_transfer(R, b) if len(tasks) > 1 else None,
        "definition": "Lopez-Paz & Ranzato 2017 (arXiv:1706.08840), on validation data",
    }
