"""The network's architecture as plain data for the manifest, and the rebuild from it.

A mixin of ``ProgressiveNet``: ``architecture()`` lists tasks, columns and adapters (with
pruned and merged ones, so the record keeps them); ``from_architecture`` rebuilds the
modules from that list, to be filled by ``load_state_dict``. Nothing here executes code
from the manifest: every field is converted to its plain type or refused.
"""

from __future__ import annotations

from dataclasses import asdict
from typing import Any

import torch.nn as nn

from ..errors import WorkspaceError
from . import adapters as adapter_kinds
from .adapters import LateralAdapter
from .adopted import AdoptedColumn
from .parts import AdapterInfo, Column, ColumnInfo, TaskInfo
from .schema import Spec

__all__ = ["ArchitectureRecord"]


class ArchitectureRecord:
    """``architecture()`` and ``from_architecture()`` for ``ProgressiveNet``."""

    def architecture(self) -> dict[str, Any]:
        """Everything needed to rebuild the modules, as plain data for the manifest."""
        arch = {
            "tasks": [_task_record(t) for t in self.task_info.values()],
            "columns": [asdict(c) for c in self.column_info],
            "adapters": [asdict(a) for a in self.adapter_info.values()],
        }
        if self.adopted is not None:
            arch["adopted"] = self.adopted.record.to_dict()
        return arch

    @classmethod
    def from_architecture(cls, spec: Spec, arch: dict[str, Any],
                          adopted: AdoptedColumn | None = None) -> Any:
        """Rebuild the modules (weights uninitialised in meaning) from ``architecture()``.

        ``adopted`` is column 0 when the architecture has one (``arch['adopted']``),
        rebuilt by the caller from its file (model.adopted.rebuild_adopted).
        """
        net = cls(spec)
        if ("adopted" in arch) != (adopted is not None):
            raise WorkspaceError("the manifest's adopted column and the model given for it "
                                 "do not match; restore the manifest from a backup")
        try:
            for c in arch["columns"]:
                if adopted is not None and int(c["index"]) == 0:
                    net.columns.append(adopted)
                else:
                    net.columns.append(Column(spec, float(c["width"])))
                net.column_info.append(ColumnInfo(int(c["index"]), str(c["task"]),
                                                  float(c["width"])))
            for t in arch["tasks"]:
                info = TaskInfo(str(t["name"]), int(t["classes"]), int(t["column"]),
                                str(t["mode"]), _class_names(t, int(t["classes"])),
                                state=str(t.get("state", "live")))
                net.task_info[info.name] = info
                net.heads[info.name] = (nn.Identity() if info.mode == "adopted"
                                        else net._make_head(info.column, info.classes))
            for a in arch["adapters"]:
                info = AdapterInfo(**a)
                net.adapter_info[info.key] = info
                if info.state == "live":
                    net.adapters[info.key] = net._rebuild_adapter(info)
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise WorkspaceError(f"the manifest's network section is malformed "
                                 f"({exc.__class__.__name__}: {exc}); restore it from a "
                                 f"backup") from None
        net._reindex()
        net.freeze()
        return net

    def _rebuild_adapter(self, info: AdapterInfo) -> LateralAdapter:
        if info.kind not in ("linear", "nonlinear"):
            builder = getattr(adapter_kinds, "rebuild_" + info.kind, None)
            if builder is None:
                raise ValueError(f"unknown adapter kind {info.kind!r}")
            return builder(self, info)
        if info.head is not None:
            classes = self.task_info[info.head].classes
            return self._head_adapter(info.head, classes, info.source, info.kind)[1]
        made = self._block_adapter(info.column, info.block, info.source, info.kind,
                                   info.extra.get("tap"))
        if made is None:
            raise ValueError(f"adapter {info.key} reads no tap of the adopted column")
        return made[1]


def _task_record(task: TaskInfo) -> dict[str, Any]:
    """A task as plain data; ``class_names`` only when it has names (older records lack it)."""
    record = asdict(task)
    if record["class_names"] is None:
        del record["class_names"]
    return record


def _class_names(record: dict[str, Any], classes: int) -> list[str] | None:
    names = record.get("class_names")
    if names is None:
        return None
    if (not isinstance(names, list) or len(names) != classes
            or not all(isinstance(n, str) for n in names)):
        raise ValueError(f"task {record.get('name')!r}: class_names must be {classes} strings")
    return list(names)
