"""The network's architecture as plain data for the manifest, and the rebuild from it.

A mixin of ``ProgressiveNet``: ``architecture()`` lists tasks, columns and adapters (with
pruned and merged ones, so the record keeps them); ``from_architecture`` rebuilds the
modules from that list, to be filled by ``load_state_dict``. Nothing here executes code
from the manifest: every field is converted to its plain type or refused.

A manifest may come from anyone, so before anything is allocated every size in it is
checked (counts, class counts, width factors, ranks: integers where integers belong,
within stated bounds), and then the whole network is built once on torch's meta device
and its tensors counted against the machine's memory (``model.budget``).
"""

from __future__ import annotations

from dataclasses import asdict
from typing import Any

import torch.nn as nn

from ..errors import WorkspaceError
from . import adapters as adapter_kinds
from .adapters import LateralAdapter
from .adopted import AdoptedColumn
from .budget import check_tensor_bytes
from .layers import plan_column
from .parts import MAX_CLASSES, MAX_WIDTH, AdapterInfo, Column, ColumnInfo, TaskInfo
from .schema import MAX_SIZE, Spec

__all__ = ["ArchitectureRecord", "MAX_TASKS"]

# The most tasks (so columns and heads) a manifest may list. Every column adds adapters
# from all earlier ones, so a network's adapters grow with the square of its columns;
# a thousand tasks is far past what the method is used for. Our own bound.
MAX_TASKS = 1024


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
        if ("adopted" in arch) != (adopted is not None):
            raise WorkspaceError("the manifest's adopted column and the model given for it "
                                 "do not match; restore the manifest from a backup")
        try:
            _check_sizes(spec, arch)
            check_tensor_bytes(lambda: cls._build(spec, arch, adopted), "the manifest's network",
                               WorkspaceError, "it was edited by hand, or it needs a machine "
                               "with more memory")
            net = cls._build(spec, arch, adopted)
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise WorkspaceError(f"the manifest's network section is malformed "
                                 f"({exc.__class__.__name__}: {exc}); restore it from a "
                                 f"backup") from None
        net._reindex()
        net.freeze()
        return net

    @classmethod
    def _build(cls, spec: Spec, arch: dict[str, Any], adopted: AdoptedColumn | None) -> Any:
        """The modules of ``arch``, on the current default device (see from_architecture)."""
        net = cls(spec)
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


def _refuse(where: str, expected: str, value: Any) -> WorkspaceError:
    shown = repr(value) if isinstance(value, str) else str(value)
    return WorkspaceError(f"the manifest's network.{where}: expected {expected}, got "
                          f"{shown[:40]}; it was edited by hand, restore it from a copy you "
                          f"trust")


def _int(value: Any, where: str, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        raise _refuse(where, f"a whole number from {low} to {high:,}", value)
    return value


def _width(value: Any, where: str) -> float:
    if (isinstance(value, bool) or not isinstance(value, (int, float))
            or not 0 < value <= MAX_WIDTH):
        raise _refuse(where, f"a width factor in (0, {MAX_WIDTH:g}]", value)
    return float(value)


def _check_sizes(spec: Spec, arch: dict[str, Any]) -> None:
    """Every count and size in ``arch`` checked before anything is built.

    Each refusal names the field, so a hand edit (``classes: 1000000000000``,
    ``width: 1e9``, ``rank: -4``) gets one sentence instead of an allocation failure.
    """
    columns, tasks, adapters = arch["columns"], arch["tasks"], arch["adapters"]
    for name, rows in (("columns", columns), ("tasks", tasks), ("adapters", adapters)):
        if not isinstance(rows, list):
            raise _refuse(name, "a list", type(rows).__name__)
    for name, rows in (("columns", columns), ("tasks", tasks)):
        if len(rows) > MAX_TASKS:
            raise _refuse(name, f"at most {MAX_TASKS:,} entries", f"{len(rows):,} entries")
    blocks = len(plan_column(spec).blocks)
    # A block adapter per (later column, earlier column, block) and a head adapter per
    # (task, earlier column), each possibly merged into one more: the most a network has.
    most = 2 * (len(columns) ** 2 * blocks + len(tasks) * max(1, len(columns)))
    live = [a for a in adapters if not isinstance(a, dict) or a.get("state", "live") == "live"]
    if len(live) > most:
        raise _refuse("adapters", f"at most {most:,} live adapters for {len(columns)} "
                                  f"columns", f"{len(live):,}")
    for i, c in enumerate(columns):
        _int(c["index"], f"columns[{i}].index", i, i)
        _width(c["width"], f"columns[{i}].width")
    for i, t in enumerate(tasks):
        _int(t["classes"], f"tasks[{i}].classes", 1, MAX_CLASSES)
        _int(t["column"], f"tasks[{i}].column", 0, max(0, len(columns) - 1))
    last = max(0, len(columns) - 1)
    for i, a in enumerate(live):
        _int(a["source"], f"adapters[{i}].source", 0, last)
        if a.get("column") is not None:
            _int(a["column"], f"adapters[{i}].column", 0, last)
        if a.get("block") is not None:
            _int(a["block"], f"adapters[{i}].block", 0, blocks - 1)
        extra = a.get("extra") or {}
        if not isinstance(extra, dict):
            raise _refuse(f"adapters[{i}].extra", "a mapping", type(extra).__name__)
        if "rank" in extra:
            _int(extra["rank"], f"adapters[{i}].extra.rank", 1, MAX_SIZE)
        for j, source in enumerate(extra.get("sources") or []):
            _int(source, f"adapters[{i}].extra.sources[{j}]", 0, last)
        if "tap" in extra:  # an index into the adopted column's taps
            taps = (arch.get("adopted") or {}).get("taps") or []
            if not taps:
                raise _refuse(f"adapters[{i}].extra.tap", "no tap (the network has no "
                              "adopted column)", extra["tap"])
            _int(extra["tap"], f"adapters[{i}].extra.tap", 0, len(taps) - 1)
