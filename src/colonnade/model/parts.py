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

__all__ = ["MAX_CLASSES", "TaskInfo", "ColumnInfo", "AdapterInfo", "Closure", "Block", "Column"]

# A bound on a task's class count, checked before a head is allocated: far above any task
# colonnade is meant for, so a larger count is nearly always a label mistake (an id used
# as a label). Our own limit, not a published figure.
MAX_CLASSES = 65_536


@dataclass
class TaskInfo:
    """A task: its classes and where its head sits."""

    name: str
    classes: int
    column: int
    mode: str  # "column": it grew its own column; "head": a head on an existing column
    class_names: list[str] | None = None  # names of classes 0..C-1, when the data had them

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


@dataclass(frozen=True)
class Closure:
    """Every part a task's output depends on."""

    task: str
    columns: tuple[int, ...]
    adapters: tuple[str, ...]
    head: str

    def state_prefixes(self) -> tuple[str, ...]:
        """Prefixes of ``state_dict`` keys that belong to this closure."""
        # The input normalisation (when the spec has one) feeds every task.
        return (("input_norm.",) + tuple(f"columns.{k}." for k in self.columns)
                + tuple(f"adapters.{a}." for a in self.adapters)
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
