"""Argument types for the command line: each refusal is one sentence argparse prints."""

from __future__ import annotations

import argparse
import math

__all__ = ["positive_int", "positive_float", "non_negative_float", "non_negative_int",
           "class_count", "name_list"]


def positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}") from None
    if value <= 0:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {value}")
    return value


def positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not value > 0 or math.isinf(value):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text}")
    return value


def non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of at least 0, got {text!r}"
                                         ) from None
    if not value >= 0 or math.isinf(value):
        raise argparse.ArgumentTypeError(f"expected a finite number of at least 0, got {text}")
    return value


def class_count(text: str) -> int:
    value = positive_int(text)
    if value < 2:
        raise argparse.ArgumentTypeError(f"a task needs at least 2 classes, got {value}")
    return value


def non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 0, got {value}")
    return value


def name_list(text: str) -> list[str]:
    """Comma-separated names, such as class names: none empty, none twice."""
    names = [n.strip() for n in text.split(",")]
    if any(not n for n in names):
        raise argparse.ArgumentTypeError(f"expected names separated by commas, got {text!r}")
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise argparse.ArgumentTypeError(f"each name may appear once; {', '.join(twice)} "
                                         f"appear twice")
    return names
