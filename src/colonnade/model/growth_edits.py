"""Growth edits: adding a column or a head, and taking adapters or tasks out.

A mixin of ``ProgressiveNet``. Every edit goes through the seal guard (``model.guard``)
before it touches anything, new parts are registered trainable through the network's
one choke point, and removals are explicit, recorded edits.
"""

from __future__ import annotations

import torch

from ..errors import UsageError
from .adapters import LateralAdapter, make_adapter
from .adopted import AdoptedColumn
from .guard import guard
from .layers import check_width
from .parts import (
    MAX_WIDTH,
    AdapterInfo,
    Column,
    ColumnInfo,
    TaskInfo,
)
from .schema import Dense

__all__ = ["GrowthEdits"]

class GrowthEdits:
    """Methods of ``ProgressiveNet``; see the module docstring."""

    def _register_adapter(self, info: AdapterInfo, module: LateralAdapter) -> None:
        self.adapters[info.key] = module
        self.adapter_info[info.key] = info
        self._reindex()

    def _block_adapter(self, k: int, b: int, j: int, kind: str | None = None,
                       tap: int | None = None) -> tuple[AdapterInfo, LateralAdapter] | None:
        """The adapter from column ``j`` into block ``b`` of column ``k``; None when ``j``
        is an adopted column and no tap feeds that block (model.bridges)."""
        lat = self.spec.lateral
        kind = kind or lat.kind
        if isinstance(self.columns[j], AdoptedColumn):
            return self._tap_block_adapter(k, b, kind, tap)
        src, dst = self.columns[j].plan.blocks[b - 1], self.columns[k].plan.blocks[b]
        module = make_adapter(kind, src.out_shape, dst.pre_shape, dst.weighted,
                              lat.reduce, lat.activation)
        return AdapterInfo(f"c{k}_b{b}_from_c{j}", kind, j, column=k, block=b), module

    def _head_adapter(self, task: str, classes: int, j: int, kind: str | None = None,
                      ) -> tuple[AdapterInfo, LateralAdapter]:
        lat = self.spec.lateral
        kind = kind or lat.kind
        if isinstance(self.columns[j], AdoptedColumn):
            return self._tap_head_adapter(task, classes, kind)
        src = self.columns[j].plan.out_shape
        module = make_adapter(kind, src, (classes,), Dense(dense=classes), lat.reduce,
                              lat.activation)
        return AdapterInfo(f"h_{task}_from_c{j}", kind, j, head=task), module

    def _add_head(self, name: str, classes: int, column: int, mode: str,
                  class_names: list[str] | None = None) -> list[str]:
        self.heads[name] = self._make_head(column, classes)
        self.task_info[name] = TaskInfo(name, classes, column, mode, class_names)
        parts = [f"head:{name}"]
        if self.spec.lateral.kind != "none":
            for j in range(column):
                info, module = self._head_adapter(name, classes, j)
                self._register_adapter(info, module)
                parts.append(f"adapter:{info.key}")
        return parts

    def add_column(self, name: str, classes: int, width: float = 1.0, seed: int = 0,
                   class_names: list[str] | None = None) -> list[str]:
        """Grow a new column, its adapters from every earlier column, and its head.

        Returns the ids of the new parts, which become the only trainable ones.
        ``class_names`` names classes 0..C-1 (recorded with the task).
        """
        self._check_new_task(name, classes)
        class_names = self._check_class_names(classes, class_names)
        if not (isinstance(width, (int, float)) and 0 < width <= MAX_WIDTH):
            raise UsageError(f"width must be a number in (0, {MAX_WIDTH:g}], got {width}")
        check_width(self.spec, float(width))
        device = self.device
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            k = len(self.columns)
            self.columns.append(Column(self.spec, float(width)))
            self.column_info.append(ColumnInfo(k, name, float(width)))
            parts = [f"column:{k}"]
            if self.spec.lateral.kind != "none":
                for b in range(1, len(self.columns[k].blocks)):
                    for j in range(k):
                        made = self._block_adapter(k, b, j)
                        if made is None:  # an adopted column with no tap for block b
                            continue
                        info, module = made
                        self._register_adapter(info, module)
                        parts.append(f"adapter:{info.key}")
            parts += self._add_head(name, classes, k, "column", class_names)
        self.to(device)
        self._make_trainable(parts)
        return parts

    def add_head(self, name: str, classes: int, on: str | None = None, seed: int = 0,
                 class_names: list[str] | None = None) -> list[str]:
        """Grow only a head (and its head adapters) on the column of task ``on``."""
        self._check_new_task(name, classes)
        class_names = self._check_class_names(classes, class_names)
        if not self.columns:
            raise UsageError("the network has no column yet; grow the first task with a column")
        column = self.task(on).column if on is not None else len(self.columns) - 1
        device = self.device
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            parts = self._add_head(name, classes, column, "head", class_names)
        self.to(device)
        self._make_trainable(parts)
        return parts

    def retire_adapters(self, keys: list[str], state: str, action: str,
                        ) -> dict[str, LateralAdapter]:
        """Take live adapters out of the forward path, as ``pruned`` or ``merged``.

        The one place adapters leave the network; adapters inside a sealed task's closure
        are refused (SealedError naming the seal) before anything changes. Returns the
        removed modules, so that ``reinstate_adapters`` can undo it.
        """
        guard(self, [f"adapter:{k}" for k in keys], action)
        removed = {}
        for k in keys:
            removed[k] = self.adapters[k]
            del self.adapters[k]
            self.adapter_info[k].state = state
        self._reindex()
        return removed

    def reinstate_adapters(self, modules: dict[str, LateralAdapter], order: list[str]) -> None:
        """Put retired adapters back live; ``order`` restores the ModuleDict's key order,
        and with it the order of ``state_dict()``."""
        self.set_adapter_modules({**dict(self.adapters.items()), **modules}, order)
        for k in modules:
            self.adapter_info[k].state = "live"
        self._reindex()

    def set_adapter_modules(self, modules: dict[str, LateralAdapter], order: list[str]) -> None:
        """Refill ``adapters`` with ``modules``: keys in ``order`` first, then the rest."""
        for k in list(self.adapters.keys()):
            del self.adapters[k]
        for k in order:
            if k in modules:
                self.adapters[k] = modules[k]
        for k, m in modules.items():
            if k not in self.adapters:
                self.adapters[k] = m
        self._reindex()

    def remove_task(self, name: str) -> None:
        """Undo the newest growth step (used to roll back a failed grow)."""
        if not self.tasks or self.tasks[-1] != name or self.task_info[name].mode == "adopted":
            raise UsageError(f"only the newest grown task can be removed, not {name!r}")
        guard(self, [f"head:{name}"], "remove")
        info = self.task_info.pop(name)
        del self.heads[name]
        for key in [k for k, a in self.adapter_info.items()
                    if a.head == name or (info.mode == "column" and a.column == info.column)]:
            del self.adapter_info[key]
            if key in self.adapters:
                del self.adapters[key]
        if info.mode == "column":
            del self.columns[info.column]
            self.column_info.pop()
        self._reindex()
        self.freeze()
