"""Closures: every part a task's output depends on, block by block.

A mixin of ``ProgressiveNet``. A head reads the last block of its column and, through
head adapters, the last block of each source column; an adapter into block b of column k
reads block b-1 of its sources; block b needs blocks 0..b-1 of its own column. So each
column contributes a prefix of blocks, and a task's output is a function of its closure
alone (DESIGN invariant 1). Seals record which closure definition they were made with.
"""

from __future__ import annotations

import torch

from ..errors import WorkspaceError
from .parts import (
    CLOSURE_DEFINITION,
    CLOSURE_DEFINITIONS,
    Closure,
    Column,
)

__all__ = ["ClosureQueries"]

class ClosureQueries:
    """Methods of ``ProgressiveNet``; see the module docstring."""

    def closure(self, task: str, definition: int = CLOSURE_DEFINITION) -> Closure:
        """Columns, blocks and adapters reachable from the task's head through live adapters.

        A head reads the last block of its column and, through head adapters, the last
        block of each source column; an adapter into block b of column k reads block b-1
        of its sources. Block b needs blocks 0..b-1 of its own column, so each column
        contributes a prefix of blocks. ``definition`` 1 takes whole columns instead (how
        seals made before block-level closures drew them).
        """
        info = self.task(task)
        if definition not in CLOSURE_DEFINITIONS:
            raise WorkspaceError(f"closure definition {definition!r} is not known to this "
                                 f"colonnade (it knows {list(CLOSURE_DEFINITIONS)})")
        full = {k: len(col.plan.blocks) for k, col in enumerate(self.columns)}
        # Only a column built from the template runs block by block; any other kind of
        # column (an adopted model, say) runs whole, so it is in a closure whole or not at
        # all.
        whole = {k for k, col in enumerate(self.columns) if not isinstance(col, Column)}
        need: dict[int, int] = {info.column: full[info.column]}
        adapters: list[str] = []
        for key, _ in self._into_head.get(task, []):
            adapters.append(key)
            for j in self._sources[key]:
                need[j] = full[j]
        # Sources always sit to the left of their targets, so one right-to-left pass
        # over columns collects every transitive dependency.
        for k in range(info.column, -1, -1):
            if k not in need:
                continue
            if definition == 1 or k in whole:
                need[k] = full[k]
            for b in range(need[k]):
                for key, _ in self._into.get((k, b), []):
                    adapters.append(key)
                    for j in self._sources[key]:
                        need[j] = max(need.get(j, 0), b)  # reads block b-1: blocks 0..b-1
        columns = tuple(sorted(k for k, d in need.items() if d > 0 or k == info.column))
        return Closure(task, columns, tuple(sorted(adapters)), task,
                       {k: need[k] for k in columns}, {k: full[k] for k in columns},
                       definition)

    def closure_state(self, task: str, definition: int = CLOSURE_DEFINITION,
                      ) -> dict[str, torch.Tensor]:
        """The parameters and buffers a task's output depends on, by state_dict key."""
        prefixes = self.closure(task, definition).state_prefixes()
        return {k: v for k, v in self.state_dict().items() if k.startswith(prefixes)}

    def live_depths(self) -> dict[int, int]:
        """Column -> leading blocks that some live task runs: what ``forward_all`` runs."""
        depths: dict[int, int] = {}
        for t in self.live_tasks:
            c = self.closure(t)
            for k in c.columns:
                depths[k] = max(depths.get(k, 0), c.depth(k))
        return depths
