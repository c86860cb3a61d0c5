"""The parts a progressive network is made of, and the plain records that describe them.

``Column`` and ``Block`` are the modules built from the spec's template; ``TaskInfo``,
``ColumnInfo`` and ``AdapterInfo`` are what the manifest stores to rebuild them;
``Closure`` names every part a task's output depends on.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import torch.nn as nn

from .layers import BlockPlan, ColumnPlan, build_layer, layer_output_shape, plan_column
from .schema import Spec

__all__ = ["MAX_CLASSES", "MAX_WIDTH", "TaskInfo", "ColumnInfo", "AdapterInfo", "Closure",
           "Block", "Column", "CLOSURE_DEFINITION", "CLOSURE_DEFINITIONS"]

# A bound on a task's class count, checked before a head is allocated: far above any task
# colonnade is meant for, so a larger count is nearly always a label mistake (an id used
# as a label). Our own limit, not a published figure.
MAX_CLASSES = 65_536
# The widest a column may be, as a factor of the template's units (``grow --width``):
# columns are normally as wide as the template or narrower. Our own bound.
MAX_WIDTH = 16.0


@dataclass
class TaskInfo:
    """A task: its classes and where its head sits."""

    name: str
    classes: int
    column: int
    mode: str  # "column": it grew its own column; "head": a head on an existing column
    class_names: list[str] | None = None  # names of classes 0..C-1, when the data had them
    state: str = "live"  # "retired": no longer predicted, exported or costed; kept on record

    def class_name(self, index: int) -> str:
        """The name of class ``index`` (its number when the task has no names)."""
        return self.class_names[index] if self.class_names else str(index)


@dataclass
class ColumnInfo:
    index: int
    task: str  # the task that grew it
    width: float


@dataclass
class AdapterInfo:
    """Where a lateral adapter runs: from ``source`` column into a block or a head."""

    key: str
    kind: str
    source: int
    column: int | None = None  # target column, for block adapters
    block: int | None = None  # target block, for block adapters
    head: str | None = None  # target task, for head adapters
    state: str = "live"
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def sources(self) -> tuple[int, ...]:
        """The columns it reads: ``source``, or for a joint adapter ``extra['sources']``."""
        return tuple(int(s) for s in self.extra.get("sources", (self.source,)))

    @property
    def target(self) -> str:
        if self.head is not None:
            return f"head {self.head}"
        return f"column {self.column} block {self.block}"


# How a closure is drawn. 1: whole columns (every block of every column reached, and
# every adapter into them). 2: block prefixes: a column's block is in the closure only if
# a live path from the task's head reaches it. Seals record the definition they were made
# with and are checked by it, so seals made under definition 1 keep verifying.
CLOSURE_DEFINITION = 2
CLOSURE_DEFINITIONS = (1, 2)


@dataclass(frozen=True)
class Closure:
    """Every part a task's output depends on.

    ``depths`` maps each closure column to how many of its leading blocks the task runs
    (a column's blocks run in order, so what is reached is always a prefix; its stem
    comes with it); ``full`` to how many blocks the column has. ``definition`` says how
    the closure was drawn (see ``CLOSURE_DEFINITION``).
    """

    task: str
    columns: tuple[int, ...]
    adapters: tuple[str, ...]
    head: str
    depths: dict[int, int] = field(default_factory=dict)
    full: dict[int, int] = field(default_factory=dict)
    definition: int = CLOSURE_DEFINITION

    def depth(self, column: int) -> int:
        """Leading blocks of ``column`` in the closure (all of them when not recorded)."""
        return self.depths.get(column, self.full.get(column, 0))

    def is_partial(self, column: int) -> bool:
        return column in self.full and self.depth(column) < self.full[column]

    def state_prefixes(self) -> tuple[str, ...]:
        """Prefixes of ``state_dict`` keys that belong to this closure."""
        cols: list[str] = []
        for k in self.columns:
            if self.is_partial(k):
                cols.append(f"columns.{k}.stem.")
                cols += [f"columns.{k}.blocks.{b}." for b in range(self.depth(k))]
            else:
                cols.append(f"columns.{k}.")
        # The input normalisation (when the spec has one) feeds every task.
        return (("input_norm.",) + tuple(cols) + tuple(f"adapters.{a}." for a in self.adapters)
                + (f"heads.{self.head}.",))


class Block(nn.Module):
    """A weighted layer and the unweighted layers after it; laterals add in between."""

    def __init__(self, plan: BlockPlan, width: float) -> None:
        super().__init__()
        self.weighted = build_layer(plan.weighted, plan.in_shape, width)
        layers, shape = [], plan.pre_shape
        for layer in plan.post:
            layers.append(build_layer(layer, shape, width))
            shape = layer_output_shape(layer, shape, width)
        self.post = nn.Sequential(*layers)


class Column(nn.Module):
    """One stack of layers built from the template, serving one task."""

    def __init__(self, spec: Spec, width: float = 1.0) -> None:
        super().__init__()
        self.width = width
        self.plan: ColumnPlan = plan_column(spec, width)
        stem, shape = [], tuple(spec.input)
        for layer in self.plan.stem:
            stem.append(build_layer(layer, shape, width))
            shape = layer_output_shape(layer, shape, width)
        self.stem = nn.Sequential(*stem)
        self.blocks = nn.ModuleList(Block(b, width) for b in self.plan.blocks)

    @property
    def out_features(self) -> int:
        return self.plan.out_shape[0]

    def extra_repr(self) -> str:
        return f"width={self.width}, out={self.out_features}"
