"""Which seal entries are active, read from the record's plain data.

A task's seals are a list of versions in ``meta["seals"][task]``; the newest one is active
unless it was lifted (``unsealed``). Kept free of torch and of the network so that the
guard and torch-free readers (``show``) decide it alike.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

__all__ = ["versions_of", "active_seals"]


def versions_of(seals: Any, task: str) -> list[dict[str, Any]]:
    """Every seal version of a task, oldest first (empty when malformed or absent)."""
    versions = seals.get(task) if isinstance(seals, dict) else None
    return list(versions) if isinstance(versions, list) else []


def active_seals(seals: Any, order: Iterable[str]) -> dict[str, dict[str, Any]]:
    """Task -> its newest seal entry, for tasks whose newest seal is not lifted.

    Tasks come in ``order`` (growth order); sealed names not in it follow at the end.
    """
    if not isinstance(seals, dict):
        return {}
    rank = {t: i for i, t in enumerate(order)}
    out = {}
    for task in sorted(seals, key=lambda t: rank.get(t, len(rank))):
        versions = versions_of(seals, task)
        entry = versions[-1] if versions else None
        if isinstance(entry, dict) and not entry.get("unsealed"):
            out[task] = entry
    return out
