"""Checks on a task's training data before any part is grown: refuse what cannot train a
meaningful classifier, warn about what makes its figures unreliable.

A task whose training rows lack a class would get a head with an output nothing ever
taught (labels {0, 2} make a 3-class head): refused, unless the class count was asked
for on purpose. A class with fewer than ``FEW_ROWS`` training rows, and validation data
missing a class, are warned about: training runs, but its accuracy says little about
those classes.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import torch

from ..errors import DataError

__all__ = ["DataWarning", "DataCheck", "FEW_ROWS", "check_training_data"]

# "A handful" of rows per class: below this a class's accuracy rests on a few samples.
# Our choice (common practice puts the floor for any per-class estimate near 5-10).
FEW_ROWS = 5


class DataWarning(UserWarning):
    """Training data that trains, but whose figures deserve a second look."""


@dataclass
class DataCheck:
    """What the checks found: one sentence per warning."""

    warnings: list[str] = field(default_factory=list)


def _counts(y: torch.Tensor, classes: int) -> list[int]:
    if y.numel() == 0:
        return [0] * classes
    return torch.bincount(y.to(torch.int64).flatten(), minlength=classes)[:classes].tolist()


def _names(classes: list[int]) -> str:
    shown = ", ".join(str(c) for c in classes[:8])
    return shown + (f" and {len(classes) - 8} more" if len(classes) > 8 else "")


def check_training_data(y: torch.Tensor, y_val: torch.Tensor, classes: int, source: str,
                        classes_given: bool = False, warn: bool = True) -> DataCheck:
    """Refuse (DataError) or warn (DataWarning) about suspicious training data.

    ``classes_given``: the class count was asked for explicitly (``--classes``), so an
    absent class is deliberate and only warned about. ``warn`` False collects the
    sentences without issuing warnings (for ranks other than the first).
    """
    found = DataCheck()
    train = _counts(y, classes)
    empty = [c for c, n in enumerate(train) if n == 0]
    if empty and not classes_given:
        seen = [c for c, n in enumerate(train) if n > 0]
        raise DataError(
            f"{source}: class{'es' * (len(empty) > 1)} {_names(empty)} of {classes} "
            f"ha{'ve' if len(empty) > 1 else 's'} no training rows (labels present: "
            f"{_names(seen)}); relabel the classes as 0..{len(seen) - 1}, or pass "
            f"--classes {classes} to keep an output that nothing trains")
    if empty:
        found.warnings.append(
            f"{source}: class{'es' * (len(empty) > 1)} {_names(empty)} ha"
            f"{'ve' if len(empty) > 1 else 's'} no training rows, so the head's "
            f"output{'s' * (len(empty) > 1)} for {'them' if len(empty) > 1 else 'it'} "
            f"will be untrained")
    few = [c for c, n in enumerate(train) if 0 < n < FEW_ROWS]
    if few:
        found.warnings.append(
            f"{source}: class{'es' * (len(few) > 1)} {_names(few)} "
            f"ha{'ve' if len(few) > 1 else 's'} fewer than {FEW_ROWS} training rows "
            f"({', '.join(str(train[c]) for c in few[:8])}); accuracy on "
            f"{'them' if len(few) > 1 else 'it'} will rest on very few samples")
    if y_val.numel():
        missing = [c for c, n in enumerate(_counts(y_val, classes)) if n == 0 and train[c]]
        if missing:
            found.warnings.append(
                f"{source}: the validation data has no rows of class"
                f"{'es' * (len(missing) > 1)} {_names(missing)}, so early stopping and the "
                f"validation accuracy say nothing about "
                f"{'them' if len(missing) > 1 else 'it'}; pass --val with every class")
    if warn:
        for sentence in found.warnings:
            warnings.warn(sentence, DataWarning, stacklevel=2)
    return found
