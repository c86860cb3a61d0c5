"""A network whose column 0 is an adopted model: the mixin of ``ProgressiveNet`` for it.

``adopt`` puts an ``AdoptedColumn`` (model.adopted) in as column 0 and makes the model's
own output the logits of its task, through an identity head. Later parts read the
adopted column through its taps: block adapters and head adapters by the rule of
``model.bridges`` (recorded per adapter as ``extra["tap"]``), heads grown on column 0 on
its last tap through a shape bridge. The indices below are where those reads land in
the column's outputs ``[tap_1, ..., tap_n, logits]``.
"""

from __future__ import annotations

from typing import Any

import torch.nn as nn

from ..errors import SpecError, UsageError
from .adapters import LateralAdapter, make_adapter
from .adopted import ADOPTED_FILE, AdoptedColumn
from .bridges import bridge_for, bridged_target, tap_for_block
from .layers import Shape
from .parts import AdapterInfo, ColumnInfo, TaskInfo
from .schema import Dense

__all__ = ["AdoptionMixin"]


class AdoptionMixin:
    """``adopt`` and the tap reads of ``ProgressiveNet`` (see the module docstring)."""

    @property
    def adopted(self) -> AdoptedColumn | None:
        """Column 0 when it is an adopted model, else None."""
        if len(self.columns) and isinstance(self.columns[0], AdoptedColumn):
            return self.columns[0]
        return None

    def adopt(self, column: AdoptedColumn, task: str) -> list[str]:
        """Make an adopted model column 0 and its output the logits of ``task``.

        Frozen from the first moment: nothing of it is ever trainable, and its head is
        the identity on the model's own output. The model file's bytes (for ``.pt2`` and
        ``.onnx``) become the workspace file ``ADOPTED_FILE``.
        """
        if len(self.columns):
            raise UsageError("a model can only be adopted as column 0, into a network with "
                             "no column yet")
        if tuple(column.record.input) != tuple(self.input_shape):
            raise SpecError(f"input: the spec's input {list(self.input_shape)} differs from "
                            f"the adopted model's {column.record.input}; make them equal")
        self._check_new_task(task, column.out_features)
        self.columns.append(column)
        self.column_info.append(ColumnInfo(0, task, 1.0))
        self.heads[task] = nn.Identity()
        self.task_info[task] = TaskInfo(task, column.out_features, 0, "adopted")
        if column.data is not None:
            self.attachments[ADOPTED_FILE] = column.attachment()
        self.freeze()
        return ["column:0", f"head:{task}"]

    # ----------------------------------------------------------------- where reads land
    def _head_input(self, info: TaskInfo) -> int:
        """Which output of its column a head reads: the last, except that a head grown on
        an adopted column reads the last tap (the last output is the adopted logits)."""
        if info.mode != "adopted" and isinstance(self.columns[info.column], AdoptedColumn):
            return -2
        return -1

    def head_reads(self, task: str) -> int:
        """The index of the output of its column that a task's head reads."""
        info = self.task(task)
        return len(self.columns[info.column].blocks) + self._head_input(info)

    def adapter_reads(self, key: str, index: int, source: int) -> int:
        """The output index a live adapter reads of its source column ``source``:
        ``index`` (``b - 1`` into block ``b``, the last into a head), or, where the source
        is the adopted column (always column 0), the adapter's tap of it. A joint adapter
        made by a merge reads its tap of column 0 and the usual output of every other
        column."""
        return self._tap_index.get(key, index) if source == 0 else index

    # ----------------------------------------------------------------- parts reading taps
    def tap_bridge(self, tap: int, target_shape: Shape, where: str,
                   ) -> tuple[Shape, nn.Module | None, Shape]:
        """Tap ``tap``'s shape, the bridge from it to ``target_shape`` (model.bridges, by
        the spec's ``lateral.bridge``) and the shape the bridge gives."""
        tap_shape = tuple(self.columns[0].record.tap_shapes[tap])
        bridge, bridged = bridge_for(tap_shape, target_shape, self.spec.lateral.bridge, where)
        return tap_shape, bridge, bridged

    def _tap_adapter(self, kind: str, tap: int, target_shape: Shape, target: Any,
                     where: str) -> tuple[dict[str, Any], LateralAdapter]:
        """An adapter reading tap ``tap`` of the adopted column through a shape bridge."""
        lat = self.spec.lateral
        tap_shape, bridge, bridged = self.tap_bridge(tap, target_shape, where)
        module = make_adapter(kind, tap_shape, target_shape,
                              bridged_target(target, target_shape), lat.reduce,
                              lat.activation, bridge, bridged)
        return {"tap": tap, "tap_name": self.columns[0].record.taps[tap]}, module

    def _tap_block_adapter(self, k: int, b: int, kind: str, tap: int | None,
                           ) -> tuple[AdapterInfo, LateralAdapter] | None:
        """The adapter from the adopted column into block ``b`` of column ``k``, or None
        when no tap feeds that block (the rule of model.bridges)."""
        if tap is None:
            tap = tap_for_block(self.columns[0].taps, b, self.spec.lateral.taps)
        if tap is None:
            return None
        dst = self.columns[k].plan.blocks[b]
        extra, module = self._tap_adapter(kind, tap, dst.pre_shape, dst.weighted,
                                          f"block {b}")
        return AdapterInfo(f"c{k}_b{b}_from_c0", kind, 0, column=k, block=b,
                           extra=extra), module

    def _tap_head_adapter(self, task: str, classes: int, kind: str,
                          ) -> tuple[AdapterInfo, LateralAdapter]:
        tap = len(self.columns[0].taps) - 1  # the last tap feeds the heads
        extra, module = self._tap_adapter(kind, tap, (classes,), Dense(dense=classes),
                                          f"head {task}")
        return AdapterInfo(f"h_{task}_from_c0", kind, 0, head=task, extra=extra), module

    def _make_head(self, column: int, classes: int) -> nn.Module:
        """A head on a column's last output; on an adopted column, on its last tap through
        the shape bridge into a dense layer (model.bridges)."""
        col = self.columns[column]
        if not isinstance(col, AdoptedColumn):
            return nn.Linear(col.out_features, classes)
        bridge, bridged = bridge_for(tuple(col.record.tap_shapes[-1]), (classes,),
                                     self.spec.lateral.bridge, "head")
        linear = nn.Linear(bridged[0], classes)
        return linear if bridge is None else nn.Sequential(bridge, linear)
