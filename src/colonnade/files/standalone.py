"""Run one exported task with torch alone: the loader of ``colonnade export`` .pt files.

This file imports only torch and the standard library, never the rest of colonnade, so
it can be copied next to a service that has nothing but torch installed::

    from standalone import load_task
    model, meta = load_task("pump_a_faults.pt")   # torch.load(..., weights_only=True)
    logits = model(x)                               # x: (N, *meta["input_shape"])

The file is a plain dictionary written by ``torch.save``: ``format``, ``version``,
``task``, ``classes``, ``class_names`` (or None), ``normalization`` (the input's
``{mean, std}`` per channel, or None), ``input_shape``, ``architecture`` (plain data
naming torch layers and their arguments, the column order, each lateral adapter's
sources and target, the input normalisation's buffer shape),
``state`` (tensors by the grown network's own ``state_dict`` keys, only those of the
task's closure) and ``meta`` (closure digest, seal, versions). ``weights_only=True`` loading
accepts exactly such dictionaries and runs no code. The forward below repeats the grown
network's operations in the same order, so the logits are bit-identical on the same
device, dtype, thread count and batch.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import torch
import torch.nn as nn

__all__ = ["FORMAT", "VERSION", "LAYERS", "build_layer", "TaskModel", "load_task"]

FORMAT = "colonnade-task"
VERSION = 1

# The torch layers an exported architecture may name; nothing else can be built.
LAYERS: dict[str, type[nn.Module]] = {cls.__name__: cls for cls in (
    nn.Linear, nn.Conv1d, nn.Conv2d, nn.BatchNorm1d, nn.BatchNorm2d, nn.LayerNorm,
    nn.GroupNorm, nn.ReLU, nn.GELU, nn.Tanh, nn.Sigmoid, nn.LeakyReLU, nn.Dropout,
    nn.MaxPool1d, nn.MaxPool2d, nn.AvgPool1d, nn.AvgPool2d, nn.AdaptiveAvgPool1d,
    nn.AdaptiveAvgPool2d, nn.Flatten, nn.Identity)}


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
    """A lateral adapter as ordered steps: multiply by a named scalar, or apply a layer."""

    def __init__(self, steps: list[dict[str, Any]]) -> None:
        super().__init__()
        self.order: list[tuple[str, str]] = []
        for step in steps:
            name = step["name"]
            if step["op"] == "scale":
                self.register_parameter(name, nn.Parameter(torch.empty(step["shape"])))
            elif step["op"] == "module":
                self.add_module(name, build_layer(step["layer"]))
            else:
                raise ValueError(f"unknown adapter step {step['op']!r}")
            self.order.append((step["op"], name))

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        for op, name in self.order:
            h = getattr(self, name) * h if op == "scale" else getattr(self, name)(h)
        return h


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


class _InputNorm(nn.Module):
    """The grown network's input normalisation: ``(x - mean) / std`` per channel."""

    def __init__(self, view: list[int]) -> None:
        super().__init__()
        self.register_buffer("mean", torch.zeros(view))
        self.register_buffer("std", torch.ones(view))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.mean) / self.std


class TaskModel(nn.Module):
    """One task's closure: its columns, the live adapters between them, its head."""

    def __init__(self, architecture: dict[str, Any]) -> None:
        super().__init__()
        self.task = architecture["task"]
        # Input normalisation (its buffers ride in the state as input_norm.mean/std).
        view = architecture.get("input_norm")
        self.input_norm = nn.Identity() if view is None else _InputNorm([int(v) for v in view])
        self.order = [int(c["index"]) for c in architecture["columns"]]
        self.head_column = int(architecture["head_column"])
        self.columns = nn.ModuleDict({str(c["index"]): _Column(c)
                                      for c in architecture["columns"]})
        self.adapters = nn.ModuleDict()
        self.into: dict[tuple[int, int], list[tuple[str, list[int]]]] = {}
        self.into_head: list[tuple[str, list[int]]] = []
        for a in architecture["adapters"]:  # in the order the grown network adds them
            self.adapters[a["key"]] = _Steps(a["steps"])
            sources = [int(j) for j in a["sources"]]
            if a["head"] is not None:
                self.into_head.append((a["key"], sources))
            else:
                self.into.setdefault((int(a["column"]), int(a["block"])), []).append(
                    (a["key"], sources))
        self.heads = nn.ModuleDict({self.task: build_layer(architecture["head"])})

    def _lateral(self, key: str, sources: list[int], outs: dict[int, list[torch.Tensor]],
                 index: int) -> torch.Tensor:
        """One adapter's output; a joint adapter reads its sources concatenated."""
        if len(sources) == 1:
            return self.adapters[key](outs[sources[0]][index])
        return self.adapters[key](torch.cat([outs[j][index] for j in sources], dim=1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        outs: dict[int, list[torch.Tensor]] = {}
        x = self.input_norm(x)
        for k in self.order:
            col = self.columns[str(k)]
            h = col.stem(x)
            hs: list[torch.Tensor] = []
            for b, block in enumerate(col.blocks):
                z = block.weighted(h)
                for key, sources in self.into.get((k, b), []):
                    z = z + self._lateral(key, sources, outs, b - 1)
                h = block.post(z)
                hs.append(h)
            outs[k] = hs
        logits = self.heads[self.task](outs[self.head_column][-1])
        for key, sources in self.into_head:
            logits = logits + self._lateral(key, sources, outs, -1)
        return logits


def load_task(path: str | Path, map_location: str | torch.device = "cpu",
              ) -> tuple[TaskModel, dict[str, Any]]:
    """The exported task as an eval-mode module, and the file's metadata."""
    blob = torch.load(path, map_location=map_location, weights_only=True)
    if not isinstance(blob, dict) or blob.get("format") != FORMAT:
        raise ValueError(f"{path}: not an exported colonnade task")
    if blob.get("version") != VERSION:
        raise ValueError(f"{path}: format version {blob.get('version')} is not {VERSION}")
    model = TaskModel(blob["architecture"])
    model.load_state_dict(blob["state"], strict=True)
    model.requires_grad_(False)
    model.eval()
    meta = {k: blob[k] for k in ("task", "classes", "input_shape")}
    meta.update(blob.get("meta") or {})
    return model, meta
