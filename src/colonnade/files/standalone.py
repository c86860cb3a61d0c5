"""Run an exported artifact with torch alone: the loader of ``colonnade export`` .pt files.

This file imports only torch and the standard library, never the rest of colonnade, so
it can be copied next to a service that has nothing but torch installed::

    from standalone import load_artifact
    model, meta = load_artifact("pumps.pt")   # torch.load(..., weights_only=True)
    logits = model(x)                          # one tensor per task, in meta["tasks"] order

The file is a plain dictionary written by ``torch.save``: ``format``, ``version``,
``architecture`` (plain data naming torch layers and their arguments, the column order,
each lateral adapter's sources and target, each task's head), ``state`` (tensors by the
grown network's own ``state_dict`` keys, only those of the tasks' joint closure) and
``meta`` (tasks and class names, input shape, closure digests, seals, versions).
``weights_only=True`` loading accepts exactly such dictionaries and runs no code. The
forward below repeats the grown network's operations in the same order, so the logits
are bit-identical on the same device, dtype, thread count and batch.

A task that reads an adopted torch model (a ``.pt2`` program, or a module adopted from
Python code, captured by ``torch.export``) ships it as ``adopted_program``: the program's
bytes, run through ``torch.export.unflatten`` with its taps read by forward hooks
(``TappedProgram``). torch's own ``torch.export.load`` unpickles parts of an archive, so
such a file needs a ``program_loader`` that does not (colonnade's
``colonnade.model.exported.load_exported_program``). An adopted ONNX model never goes
into a .pt file (it runs in onnxruntime; colonnade composes it into an .onnx artifact).

Files of the first format (``colonnade-task`` version 1, one task) still load.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import torch
import torch.nn as nn

__all__ = ["FORMAT", "VERSION", "LAYERS", "build_layer", "ArtifactModel", "load_artifact",
           "load_task", "TappedProgram", "program_column"]

FORMAT = "colonnade-artifact"
VERSION = 1
_LEGACY = ("colonnade-task", 1)  # one task per file, the format before artifacts

# The torch layers an exported architecture may name; nothing else can be built.
LAYERS: dict[str, type[nn.Module]] = {cls.__name__: cls for cls in (
    nn.Linear, nn.Conv1d, nn.Conv2d, nn.BatchNorm1d, nn.BatchNorm2d, nn.LayerNorm,
    nn.GroupNorm, nn.ReLU, nn.GELU, nn.Tanh, nn.Sigmoid, nn.LeakyReLU, nn.Dropout,
    nn.MaxPool1d, nn.MaxPool2d, nn.AvgPool1d, nn.AvgPool2d, nn.AdaptiveAvgPool1d,
    nn.AdaptiveAvgPool2d, nn.Flatten, nn.Identity, nn.Upsample)}


def build_layer(desc: dict[str, Any]) -> nn.Module:
    """A torch layer from ``{"type": NAME, "args": {...}}`` or a ``Sequential`` of them."""
    kind = desc["type"]
    if kind == "Sequential":
        return nn.Sequential(*(build_layer(d) for d in desc["layers"]))
    if kind not in LAYERS:
        raise ValueError(f"unknown layer type {kind!r} in the exported architecture")
    args = {k: tuple(v) if isinstance(v, list) else v for k, v in desc.get("args", {}).items()}
    return LAYERS[kind](**args)


class _Steps(nn.Module):
    """A lateral adapter as ordered steps: multiply by a named scalar, apply a layer, or
    add a branch (steps of its own) run on the adapter's second input: a joint adapter
    that reads an adopted column's tap beside other columns (colonnade's JointAdapter:
    ``U (V h + T bridge(tap))``). Every step's name is its key in the state."""

    def __init__(self, steps: list[dict[str, Any]]) -> None:
        super().__init__()
        self.order = self._add(steps)
        self.branched = any(op == "add_branch" for op, _ in self.order)

    def _add(self, steps: list[dict[str, Any]]) -> list[tuple[str, Any]]:
        order: list[tuple[str, Any]] = []
        for step in steps:
            if step["op"] == "add_branch":
                order.append(("add_branch", self._add(step["steps"])))
                continue
            name = step["name"]
            if step["op"] == "scale":
                self.register_parameter(name, nn.Parameter(torch.empty(step["shape"])))
            elif step["op"] == "module":
                self.add_module(name, build_layer(step["layer"]))
            else:
                raise ValueError(f"unknown adapter step {step['op']!r}")
            order.append((step["op"], name))
        return order

    def _run(self, order: list[tuple[str, Any]], h: torch.Tensor,
             branch: torch.Tensor | None) -> torch.Tensor:
        for op, name in order:
            if op == "add_branch":
                h = h + self._run(name, branch, None)
            else:
                h = getattr(self, name) * h if op == "scale" else getattr(self, name)(h)
        return h

    def forward(self, h: torch.Tensor, branch: torch.Tensor | None = None) -> torch.Tensor:
        return self._run(self.order, h, branch)


class _Block(nn.Module):
    def __init__(self, desc: dict[str, Any]) -> None:
        super().__init__()
        self.weighted = build_layer(desc["weighted"])
        self.post = nn.Sequential(*(build_layer(d) for d in desc["post"]))


class _Column(nn.Module):
    def __init__(self, desc: dict[str, Any]) -> None:
        super().__init__()
        self.stem = nn.Sequential(*(build_layer(d) for d in desc["stem"]))
        self.blocks = nn.ModuleList(_Block(b) for b in desc["blocks"])


class _Given(nn.Module):
    """Column 0 when it is an adopted model: its outputs ``[tap_1, ..., tap_n, logits]``
    come from outside (``forward(x, *given)``) or from the module ``attach_adopted`` puts
    in its place. The adopted file's SHA-256, where the column is a file, is kept as the
    buffer the grown network keeps (``model_sha256``), so the state matches its digest."""

    def __init__(self, desc: dict[str, Any]) -> None:
        super().__init__()
        self.outputs = int(desc["outputs"])
        if desc.get("sha256"):
            self.register_buffer("model_sha256", torch.zeros(32, dtype=torch.uint8))


class TappedProgram(nn.Module):
    """An adopted torch model as a ``torch.export`` program: ``[tap_1, ..., tap_n, logits]``.

    The program runs through ``torch.export.unflatten``, which keeps the submodules and
    their names, and the taps are read by forward hooks that only copy a submodule's
    output, as colonnade's own adopted column does (model/taps.py). ``weights`` says
    whether the program's tensors are part of this module's state (a model adopted from
    Python code, whose tensors the artifact's state holds) or the program file is (a
    .pt2 file, whose SHA-256 the state holds as ``model_sha256``).
    """

    def __init__(self, program: Any, taps: list[str], weights: bool) -> None:
        super().__init__()
        with warnings.catch_warnings():  # torch 2.13 warns about its own pytree internals
            warnings.simplefilter("ignore", FutureWarning)
            unflat = torch.export.unflatten(program)
        if weights:
            self.model = unflat
        else:
            self._program = [unflat]  # a list, so its tensors stay out of the state
            self.register_buffer("model_sha256", torch.zeros(32, dtype=torch.uint8))
        self.taps = list(taps)
        self._seen: dict[str, torch.Tensor] = {}
        named = dict(unflat.named_modules())
        for tap in self.taps:
            named[tap].register_forward_hook(self._hook(tap))

    def _hook(self, tap: str) -> Any:
        def read(_module: nn.Module, _inputs: Any, output: Any) -> None:
            self._seen[tap] = output.clone()
        return read

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        self._seen = {}
        logits = (self.model if hasattr(self, "model") else self._program[0])(x)
        seen, self._seen = self._seen, {}
        return [*(seen[t] for t in self.taps), logits]


def program_column(blob: dict[str, Any], loader: Any) -> TappedProgram | None:
    """The artifact's adopted torch program as a column, or None if it holds none.

    ``loader(data) -> ExportedProgram`` reads the program's bytes. torch's own
    ``torch.export.load`` unpickles parts of an archive, so pass one that does not
    (colonnade's ``colonnade.model.exported.load_exported_program`` refuses any archive
    that would need it).
    """
    data = blob.get("adopted_program")
    if data is None:
        return None
    if loader is None:
        raise ValueError("this artifact holds an adopted torch.export program; pass "
                         "program_loader=colonnade.model.exported.load_exported_program, "
                         "which reads it without running code from the file")
    desc = next(c["adopted"] for c in blob["architecture"]["columns"] if "adopted" in c)
    program = loader(bytes(data.numpy().tobytes()))
    return TappedProgram(program, desc["taps"], desc["format"] == "module").eval()


class _Normalize(nn.Module):
    """The network's input normalisation, ``(x - mean) / std`` per channel (two buffers)."""

    def __init__(self, shape: list[int]) -> None:
        super().__init__()
        view = (int(shape[0]),) + (1,) * (len(shape) - 1)  # broadcast over (C, ...)
        self.register_buffer("mean", torch.zeros(view))
        self.register_buffer("std", torch.ones(view))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.mean) / self.std


def _legacy_architecture(arch: dict[str, Any]) -> dict[str, Any]:
    """A one-task architecture of the first format, in the artifact's form."""
    return {"columns": arch["columns"], "adapters": arch["adapters"],
            "tasks": [{"task": arch["task"], "head": arch["head"],
                       "head_column": arch["head_column"]}]}


class ArtifactModel(nn.Module):
    """Tasks' joint closure: columns, the live adapters between them, one head per task.

    ``forward(x)`` returns a tuple of logits, one per task in ``self.tasks`` order; each
    column is computed once, as the grown network's ``forward_all`` does.
    """

    def __init__(self, architecture: dict[str, Any]) -> None:
        super().__init__()
        if "tasks" not in architecture:
            architecture = _legacy_architecture(architecture)
        self.tasks = [str(t["task"]) for t in architecture["tasks"]]
        shape = architecture.get("normalize_shape")
        self.input_norm = _Normalize(shape) if shape else nn.Identity()
        self.head_column = {str(t["task"]): int(t["head_column"])
                            for t in architecture["tasks"]}
        self.order = [int(c["index"]) for c in architecture["columns"]]
        self.columns = nn.ModuleDict({str(c["index"]): _Given(c["adopted"]) if "adopted" in c
                                      else _Column(c) for c in architecture["columns"]})
        # Which output of its column a head reads (-1, the last, unless the file says).
        self.head_reads = {str(t["task"]): int(t.get("reads", -1))
                           for t in architecture["tasks"]}
        self.adapters = nn.ModuleDict()
        self.into: dict[tuple[int, int], list[tuple[str, list[int]]]] = {}
        self.into_head: dict[str, list[tuple[str, list[int]]]] = {t: [] for t in self.tasks}
        # An adapter reading an adopted column's tap: the index of that tap. A joint
        # adapter's first source is then the adopted column, read there and passed to its
        # branch (``_Steps``); its other sources read the usual block.
        self.reads: dict[str, int] = {}
        for a in architecture["adapters"]:  # in the order the grown network adds them
            self.adapters[a["key"]] = _Steps(a["steps"])
            sources = [int(j) for j in a["sources"]]
            if a.get("reads") is not None:
                self.reads[a["key"]] = int(a["reads"])
            if a["head"] is not None:
                self.into_head[str(a["head"])].append((a["key"], sources))
            else:
                self.into.setdefault((int(a["column"]), int(a["block"])), []).append(
                    (a["key"], sources))
        self.heads = nn.ModuleDict({str(t["task"]): build_layer(t["head"])
                                    for t in architecture["tasks"]})

    @property
    def given(self) -> list[int]:
        """Columns whose outputs ``forward`` takes as extra inputs (an adopted ONNX model,
        run by onnxruntime beside this model), in order."""
        return [k for k in self.order if isinstance(self.columns[str(k)], _Given)]

    def attach_adopted(self, index: int, module: nn.Module) -> None:
        """Run ``module`` (input -> ``[tap_1, ..., tap_n, logits]``) as column ``index``."""
        if not isinstance(self.columns[str(index)], _Given):
            raise ValueError(f"column {index} of the artifact is not an adopted column")
        self.columns[str(index)] = module

    def _lateral(self, key: str, sources: list[int], outs: dict[int, list[torch.Tensor]],
                 index: int) -> torch.Tensor:
        """One adapter's output; a joint adapter reads its sources concatenated."""
        adapter = self.adapters[key]
        if len(sources) == 1:
            return adapter(outs[sources[0]][self.reads.get(key, index)])
        if adapter.branched:  # sources (tap, columns...): the tap goes to the branch
            tap = outs[sources[0]][self.reads[key]]
            rest = [outs[j][index] for j in sources[1:]]
            return adapter(rest[0] if len(rest) == 1 else torch.cat(rest, dim=1), tap)
        return adapter(torch.cat([outs[j][index] for j in sources], dim=1))

    def forward(self, x: torch.Tensor, *given: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """Every task's logits; ``given`` holds the outputs of the ``given`` columns."""
        outs: dict[int, list[torch.Tensor]] = {}
        raw, x = x, self.input_norm(x)
        supplied = list(given)
        for k in self.order:
            col = self.columns[str(k)]
            if isinstance(col, _Given):  # an adopted ONNX model's outputs, passed in
                if len(supplied) < col.outputs:
                    raise ValueError(f"column {k} is an adopted model run outside this "
                                     f"module; pass its {col.outputs} outputs after x")
                outs[k], supplied = supplied[:col.outputs], supplied[col.outputs:]
                continue
            if not isinstance(col, _Column):  # an adopted torch model: the raw input
                outs[k] = list(col(raw))
                continue
            h = col.stem(x)
            hs: list[torch.Tensor] = []
            for b, block in enumerate(col.blocks):
                z = block.weighted(h)
                for key, sources in self.into.get((k, b), []):
                    z = z + self._lateral(key, sources, outs, b - 1)
                h = block.post(z)
                hs.append(h)
            outs[k] = hs
        every = []
        for task in self.tasks:
            logits = self.heads[task](outs[self.head_column[task]][self.head_reads[task]])
            for key, sources in self.into_head[task]:
                logits = logits + self._lateral(key, sources, outs, -1)
            every.append(logits)
        return tuple(every)


class _OneTask(nn.Module):
    """An artifact of one task, called as ``model(x) -> logits`` (the first format's API)."""

    def __init__(self, model: ArtifactModel) -> None:
        super().__init__()
        self.model = model

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.model(x)[0]


def load_artifact(path: str | Path, map_location: str | torch.device = "cpu",
                  program_loader: Any = None) -> tuple[ArtifactModel, dict[str, Any]]:
    """The artifact as an eval-mode module returning one tensor per task, and its metadata.

    ``program_loader`` is needed only for an artifact holding an adopted torch model
    (see ``program_column``).
    """
    blob = torch.load(path, map_location=map_location, weights_only=True)
    kind = (blob.get("format"), blob.get("version")) if isinstance(blob, dict) else None
    if kind not in ((FORMAT, VERSION), _LEGACY):
        raise ValueError(f"{path}: not an exported colonnade artifact of a format this "
                         f"loader reads ({FORMAT} version {VERSION})")
    model = ArtifactModel(blob["architecture"])
    column = program_column(blob, program_loader)
    if column is not None:
        model.attach_adopted(model.given[0], column)
    model.load_state_dict(blob["state"], strict=True)
    model.requires_grad_(False)
    model.eval()
    meta = dict(blob.get("meta") or {})
    if kind == _LEGACY:
        meta.update({k: blob[k] for k in ("task", "classes", "input_shape")})
    return model, meta


def load_task(path: str | Path, map_location: str | torch.device = "cpu",
              program_loader: Any = None) -> tuple[nn.Module, dict[str, Any]]:
    """A one-task file as an eval-mode module ``model(x) -> logits``, and its metadata."""
    model, meta = load_artifact(path, map_location, program_loader)
    if len(model.tasks) != 1:
        raise ValueError(f"{path}: holds {len(model.tasks)} tasks; use load_artifact")
    return _OneTask(model).eval(), meta
