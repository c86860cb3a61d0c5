"""The grown network: columns, lateral adapters and heads (Rusu et al. 2016).

Invariant: new parts never feed old ones. Column k reads only the input and earlier
columns, through adapters keyed by (target column, block, source column); a head reads
its own column and, through head adapters, earlier columns. So a task's logits are a
function of its *closure* alone, and growing the network cannot move them.

Frozen parts have ``requires_grad=False`` and always run in eval mode; only the parts
of the task being grown are trainable, and ``train()`` touches only those.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Iterator
from typing import Any

import torch
import torch.nn as nn

from ..errors import DataError, SealedError, UsageError, WorkspaceError
from .adopted import AdoptedColumn
from .adoption import AdoptionMixin
from .architecture import ArchitectureRecord
from .closure import ClosureQueries
from .growth_edits import GrowthEdits
from .guard import guard, guard_state, is_sealed
from .layers import Shape
from .normalization import InputNormalization
from .parts import (
    MAX_CLASSES,
    AdapterInfo,
    Block,
    Closure,
    Column,
    ColumnInfo,
    TaskInfo,
)
from .schema import Dense, Spec

__all__ = ["ProgressiveNet", "Column", "Block", "TaskInfo", "ColumnInfo", "AdapterInfo",
           "Closure", "TASK_NAME"]

TASK_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,63}$")


class ProgressiveNet(ClosureQueries, GrowthEdits, ArchitectureRecord, AdoptionMixin, nn.Module):
    """A progressive network grown one column or head per task.

    ``net(x, task=NAME)`` returns that task's logits; ``forward_all(x)`` every task's,
    computing each column once. ``meta`` carries what the workspace manifest records
    besides the architecture (training records, growth history, later seals).
    """

    def __init__(self, spec: Spec) -> None:
        super().__init__()
        self.spec = spec
        self.input_shape: Shape = tuple(spec.input)
        # The spec's input normalisation runs first for every column; nn.Identity when the
        # spec has none (then the state dict has no keys for it).
        norm = spec.normalize
        self.input_norm: nn.Module = (
            nn.Identity() if norm is None
            else InputNormalization(self.input_shape, *(None, None) if norm == "fit"
                                    else (norm.mean, norm.std)))
        self.columns = nn.ModuleList()
        self.adapters = nn.ModuleDict()
        self.heads = nn.ModuleDict()
        self.task_info: dict[str, TaskInfo] = {}
        self.column_info: list[ColumnInfo] = []
        self.adapter_info: dict[str, AdapterInfo] = {}
        self.meta: dict[str, Any] = {"history": [], "records": {}}
        # Extra tensor files of the workspace (file name -> tensors), e.g. seal references.
        self.attachments: dict[str, dict[str, torch.Tensor]] = {}
        # Files the workspace keeps byte for byte (file name -> bytes), e.g. seal probes.
        self.kept_files: dict[str, bytes] = {}
        self._trainable: set[str] = set()
        self._into: dict[tuple[int, int], list[tuple[str, int]]] = {}
        self._into_head: dict[str, list[tuple[str, int]]] = {}
        self._sources: dict[str, tuple[int, ...]] = {}  # live adapter -> columns it reads
        self._tap_index: dict[str, int] = {}  # adapter reading an adopted tap -> its output

    # ----------------------------------------------------------------- inspection
    @property
    def live_tasks(self) -> list[str]:
        """Tasks not retired, in growth order: what is predicted, exported and costed."""
        return [t for t, info in self.task_info.items() if info.state == "live"]

    @property
    def tasks(self) -> list[str]:
        """Task names in growth order."""
        return list(self.task_info)

    @property
    def device(self) -> torch.device:
        for p in self.parameters():
            return p.device
        for b in self.buffers():  # a network of only a .pt2 or .onnx adopted column
            return b.device
        return torch.device("cpu")

    def task(self, name: str) -> TaskInfo:
        if name not in self.task_info:
            known = ", ".join(self.task_info) or "none yet"
            raise WorkspaceError(f"no task named {name!r}; the tasks are: {known}")
        return self.task_info[name]

    def adapters_into_block(self, column: int, block: int) -> list[tuple[str, int]]:
        """Live adapters into a block as (key, source column), in source order."""
        return list(self._into.get((column, block), []))

    def adapters_into_head(self, task: str) -> list[tuple[str, int]]:
        return list(self._into_head.get(task, []))

    def adapter_sources(self, key: str) -> tuple[int, ...]:
        """The columns a live adapter reads: one, or several for a joint adapter."""
        return self._sources[key]

    def lateral_geometry(self, sources: tuple[int, ...], column: int | None = None,
                         block: int | None = None, head: str | None = None,
                         ) -> tuple[list[Shape], Shape, Any]:
        """Source shapes, target shape and target layer spec of a lateral connection."""
        if head is not None:
            classes = self.task_info[head].classes
            return ([self.columns[j].plan.out_shape for j in sources], (classes,),
                    Dense(dense=classes))
        dst = self.columns[column].plan.blocks[block]
        return ([self.columns[j].plan.blocks[block - 1].out_shape for j in sources],
                dst.pre_shape, dst.weighted)

    def part_modules(self) -> Iterator[tuple[str, nn.Module]]:
        """Every part with its id: ``column:K``, ``adapter:KEY``, ``head:TASK``."""
        for k, col in enumerate(self.columns):
            yield f"column:{k}", col
        for key, ad in self.adapters.items():
            yield f"adapter:{key}", ad
        for name, head in self.heads.items():
            yield f"head:{name}", head

    def is_trainable(self, part: str) -> bool:
        return part in self._trainable

    @property
    def trainable_parts(self) -> list[str]:
        return sorted(self._trainable)

    def trainable_parameters(self) -> list[nn.Parameter]:
        return [p for part, m in self.part_modules() if part in self._trainable
                for p in m.parameters()]

    def extra_repr(self) -> str:
        frozen = "all frozen" if not self._trainable else f"training {sorted(self._trainable)}"
        return (f"input={list(self.input_shape)}, tasks={self.tasks}, "
                f"lateral={self.spec.lateral.kind}, {frozen}")

    # ----------------------------------------------------------------- forward
    def _check_input(self, x: torch.Tensor) -> None:
        if not isinstance(x, torch.Tensor):
            raise DataError(f"the network takes a torch.Tensor, got {type(x).__module__}."
                            f"{type(x).__name__}; convert it first, e.g. "
                            f"torch.from_numpy(x).float()")
        if tuple(x.shape[1:]) != self.input_shape:
            raise DataError(f"input has sample shape {list(x.shape[1:])}, but the network "
                            f"expects {list(self.input_shape)}")

    def run_columns(self, x: torch.Tensor, columns: Iterable[int],
                    given: dict[int, list[torch.Tensor]] | None = None,
                    depths: dict[int, int] | None = None,
                    ) -> dict[int, list[torch.Tensor]]:
        """Block outputs of the named columns, in increasing order.

        ``given`` holds block outputs already known (for example cached outputs of frozen
        columns); those columns are not recomputed. ``depths`` limits a column to its
        leading blocks (a closure's ``depths``); absent columns run whole. Every source of
        a live adapter into a block that runs must itself be listed or given.
        """
        outs: dict[int, list[torch.Tensor]] = dict(given or {})
        raw, x = x, self.input_norm(x)
        for k in sorted(columns):
            if k in outs:
                continue
            col = self.columns[k]
            if isinstance(col, AdoptedColumn):
                # The input exactly as the adopted model was certified on: not normalised.
                outs[k] = col(raw)  # [tap_1, ..., tap_n, logits] (model.adoption)
                continue
            # The stem's and post's layers are called one by one rather than through their
            # nn.Sequential: the same operations, fewer module calls for small batches.
            h = x
            for layer in col.stem:
                h = layer(h)
            hs: list[torch.Tensor] = []
            blocks = list(col.blocks)
            if depths is not None and k in depths:
                blocks = blocks[:depths[k]]
            for b, block in enumerate(blocks):
                h = block.weighted(h)
                for key, _ in self._into.get((k, b), []):
                    h = h + self._lateral(key, outs, b - 1)
                for layer in block.post:
                    h = layer(h)
                hs.append(h)
            outs[k] = hs
        return outs

    def head_logits(self, task: str, outs: dict[int, list[torch.Tensor]]) -> torch.Tensor:
        info = self.task_info[task]
        logits = self.heads[task](outs[info.column][self._head_input(info)])
        for key, _ in self._into_head.get(task, []):
            logits = logits + self._lateral(key, outs, -1)
        return logits

    def _lateral(self, key: str, outs: dict[int, list[torch.Tensor]], index: int,
                 ) -> torch.Tensor:
        """One adapter's output; a joint adapter reads its sources concatenated, and one
        that took in a tap adapter reads that tap (of column 0) as its second input."""
        sources = self._sources[key]
        if len(sources) == 1:
            return self.adapters[key](outs[sources[0]][self.adapter_reads(key, index,
                                                                          sources[0])])
        if key in self._tap_index:  # sources (0, j, ...): the tap, then the columns
            tap = outs[0][self._tap_index[key]]
            rest = [outs[s][index] for s in sources[1:]]
            return self.adapters[key](rest[0] if len(rest) == 1 else torch.cat(rest, dim=1),
                                      tap)
        return self.adapters[key](torch.cat([outs[s][index] for s in sources], dim=1))

    def forward(self, x: torch.Tensor, task: str | None = None,
                given: dict[int, list[torch.Tensor]] | None = None) -> torch.Tensor:
        """The task's logits; ``given`` passes known block outputs on to ``run_columns``.

        Training reuses cached outputs of frozen columns through ``given`` (cache.py), in
        this same call, so wrappers such as DistributedDataParallel still see one forward.
        """
        if task is None:
            if len(self.task_info) != 1:
                raise UsageError("this network has several tasks; pass task=NAME")
            task = self.tasks[0]
        self.task(task)
        self._check_input(x)
        closure = self.closure(task)
        outs = self.run_columns(x, closure.columns, given, closure.depths)
        return self.head_logits(task, outs)

    def forward_all(self, x: torch.Tensor) -> dict[str, torch.Tensor]:
        """Every live task's logits, computing each column (as far as any of them reads
        it) once; retired tasks are left out."""
        self._check_input(x)
        live = self.live_tasks
        if len(live) == len(self.task_info):
            # Every column's own task is live and runs it whole: run every column whole.
            outs = self.run_columns(x, range(len(self.columns)))
        else:
            depths = self.live_depths()
            outs = self.run_columns(x, sorted(depths), depths=depths)
        return {t: self.head_logits(t, outs) for t in live}

    # ----------------------------------------------------------------- train / freeze
    def train(self, mode: bool = True) -> ProgressiveNet:
        """Only trainable parts follow ``mode``; frozen parts stay in eval mode."""
        self.training = mode
        for module in self.children():
            module.train(False)
        if mode:
            for part, module in self.part_modules():
                if part in self._trainable:
                    module.train(True)
        return self

    def freeze(self) -> None:
        """Freeze everything: no gradients, eval mode, nothing trainable."""
        for p in self.parameters():
            p.requires_grad_(False)
        self._trainable.clear()
        self.train(False)

    def _make_trainable(self, parts: list[str]) -> None:
        """The one place parts become trainable; everything else is frozen.

        Parts inside a sealed task's closure are refused (SealedError naming the seal)
        before anything changes.
        """
        guard(self, parts, "train")
        modules = dict(self.part_modules())
        self.freeze()
        for part in parts:
            for p in modules[part].parameters():
                p.requires_grad_(True)
            self._trainable.add(part)

    # ----------------------------------------------------------------- growth
    def _check_new_task(self, name: str, classes: int) -> None:
        if not TASK_NAME.match(name):
            raise UsageError(f"task name {name!r} must start with a letter and hold only "
                             f"letters, digits, '_' or '-' (at most 64 characters)")
        if name in self.task_info:
            raise UsageError(f"a task named {name!r} exists already; choose another name")
        if not isinstance(classes, int) or classes < 2:
            raise UsageError(f"a task needs at least 2 classes, got {classes}")
        if classes > MAX_CLASSES:
            raise UsageError(f"a task may have at most {MAX_CLASSES} classes, got {classes}; "
                             f"class labels must run 0..C-1")

    def _check_class_names(self, classes: int, names: list[str] | None) -> list[str] | None:
        if names is None:
            return None
        names = [str(n) for n in names]
        if len(names) != classes or len(set(names)) != len(names) or not all(names):
            raise UsageError(f"a task of {classes} classes needs {classes} distinct, non-empty "
                             f"class names, got {len(names)}: {', '.join(names[:8])}")
        return names

    # ----------------------------------------------------------------- input normalisation
    @property
    def normalization(self) -> dict[str, list[float]] | None:
        """The input normalisation's per-channel mean and std, or None without one."""
        norm = self.input_norm
        return norm.values() if isinstance(norm, InputNormalization) else None

    def set_normalization(self, mean: list[float], std: list[float]) -> None:
        """Fix the input normalisation; allowed only while the network has no task.

        Every task's outputs depend on it, so once the first task exists it is fixed:
        changing it would move every task (and break every seal).
        """
        if not isinstance(self.input_norm, InputNormalization):
            raise UsageError("the spec has no input normalisation; add input.normalize to "
                             "the spec to use one")
        if self.tasks:
            sealed = [t for t in self.tasks if is_sealed(self, t)]
            also = f" (sealed: {', '.join(sealed)})" if sealed else ""
            raise (SealedError if sealed else UsageError)(
                f"the input normalisation is fixed once the first task exists; changing it "
                f"would move every task's outputs ({', '.join(self.tasks)}){also}")
        channels = self.input_norm.channels
        for name, values in (("mean", mean), ("std", std)):
            if len(values) not in (1, channels) or not all(
                    isinstance(v, (int, float)) and v == v and abs(v) != float("inf")
                    for v in values):
                raise UsageError(f"normalisation {name} needs 1 or {channels} finite numbers, "
                                 f"got {list(values)}")
        if any(v <= 0 for v in std):
            raise UsageError(f"normalisation std must be positive, got {list(std)}")
        self.input_norm.set(mean, std)

    def _reindex(self) -> None:
        into: dict[tuple[int, int], list[tuple[str, int]]] = {}
        into_head: dict[str, list[tuple[str, int]]] = {}
        sources: dict[str, tuple[int, ...]] = {}
        taps: dict[str, int] = {}
        for key, info in self.adapter_info.items():
            if info.state != "live" or key not in self.adapters:
                continue
            sources[key] = info.sources
            if "tap" in info.extra:
                taps[key] = int(info.extra["tap"])
            if info.head is not None:
                into_head.setdefault(info.head, []).append((key, info.source))
            else:
                into.setdefault((info.column, info.block), []).append((key, info.source))
        for targets in (into, into_head):
            for lst in targets.values():
                lst.sort(key=lambda item: (item[1], item[0]))
        self._into, self._into_head, self._sources = into, into_head, sources
        self._tap_index = taps

    # ----------------------------------------------------------------- persistence
    def load_state_dict(self, state_dict: Any, strict: bool = True, assign: bool = False,
                        ) -> Any:
        """As ``nn.Module.load_state_dict``, but refuses to change a sealed closure."""
        guard_state(self, state_dict)
        return super().load_state_dict(state_dict, strict=strict, assign=assign)
