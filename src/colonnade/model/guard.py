"""The seal guard: which parts of a network are sealed, and the refusal to change them.

A seal's closure may not be written again (DESIGN invariant 3). This is a property of the
network, not of files or of how a seal was made, so it lives in the model layer: the
network's one choke point for trainable parts, ``load_state_dict``, pruning and merging,
and the store's save all call it. Seal entries themselves are made by
``colonnade.evidence.seal``; here they are only read from ``net.meta["seals"]``. Tensor
digests come from ``model.digest`` so that the guard and the seals hash alike.

Tensors mean something only under the architecture that computes with them: the same
weights under another lateral activation, reduce factor, layer order or width give other
outputs. So a seal also records its closure's architecture (``closure_architecture``) and
the guard refuses to save a sealed closure whose architecture or spec moved.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import asdict
from typing import Any

import torch
from torch import nn

from ..errors import SealedError
from .digest import closure_digests, tensor_digest
from .parts import CLOSURE_DEFINITIONS
from .seal_index import active_seals, versions_of

# The network calls the guard, so the guard cannot import the network: ``net`` below is a
# ProgressiveNet, read through its public attributes (meta, tasks, closure, ...).
ProgressiveNet = nn.Module

__all__ = ["seals_of", "latest_seal", "sealed_tasks", "is_sealed", "sealed_parts", "guard",
           "guard_state", "closure_findings", "verify_unchanged", "closure_definition",
           "closure_architecture", "first_difference"]


def seals_of(net: ProgressiveNet, task: str) -> list[dict[str, Any]]:
    """Every seal version of a task, oldest first."""
    return versions_of(net.meta.get("seals") or {}, task)


def latest_seal(net: ProgressiveNet, task: str) -> dict[str, Any] | None:
    versions = seals_of(net, task)
    return versions[-1] if versions else None


def sealed_tasks(net: ProgressiveNet) -> dict[str, dict[str, Any]]:
    """Tasks under an active seal, with their newest seal entry, in growth order."""
    return active_seals(net.meta.get("seals") or {}, net.tasks)


def is_sealed(net: ProgressiveNet, task: str) -> bool:
    return task in sealed_tasks(net)


def sealed_parts(net: ProgressiveNet) -> dict[str, tuple[str, dict[str, Any]]]:
    """Part id -> (sealed task, seal entry), over the recorded and the current closure."""
    out: dict[str, tuple[str, dict[str, Any]]] = {}
    for task, entry in sealed_tasks(net).items():
        recorded = entry.get("closure") if isinstance(entry.get("closure"), dict) else {}
        columns = set(recorded.get("columns") or [])
        adapters = set(recorded.get("adapters") or [])
        if task in net.task_info:
            closure = net.closure(task)
            columns |= set(closure.columns)
            adapters |= set(closure.adapters)
        parts = ([f"column:{k}" for k in sorted(columns)]
                 + [f"adapter:{a}" for a in sorted(adapters)] + [f"head:{task}"])
        for part in parts:
            out.setdefault(part, (task, entry))
    return out


def _describe_part(part: str) -> str:
    kind, _, name = part.partition(":")
    return f"the head of task {name!r}" if kind == "head" else f"{kind} {name}"


def _refusal(action: str, what: str, task: str, entry: Mapping[str, Any]) -> SealedError:
    return SealedError(
        f"cannot {action} {what}: it belongs to the closure of task {task!r}, sealed as "
        f"seal v{entry.get('version')} on {entry.get('time')}; unseal it first with "
        f"'colonnade unseal WS --task {task} --reason TEXT'")


def guard(net: ProgressiveNet, parts: Iterable[str], action: str = "train") -> None:
    """Refuse, with one sentence naming the seal, any part inside a sealed closure."""
    owned = sealed_parts(net)
    for part in parts:
        if part in owned:
            task, entry = owned[part]
            raise _refusal(action, _describe_part(part), task, entry)


def guard_state(net: ProgressiveNet, state: Mapping[str, torch.Tensor]) -> None:
    """Refuse to load tensors that would change a sealed closure (``load_state_dict``)."""
    for task, entry in sealed_tasks(net).items():
        recorded = _recorded_tensors(entry)
        for key, value in state.items():
            if key in recorded and tensor_digest(key, value) != recorded[key]:
                raise _refusal("load new weights into", f"tensor {key!r}", task, entry)


def _recorded_tensors(entry: Mapping[str, Any]) -> dict[str, str]:
    closure = entry.get("closure")
    tensors = closure.get("tensors") if isinstance(closure, dict) else None
    return dict(tensors) if isinstance(tensors, dict) else {}


def closure_definition(entry: Mapping[str, Any]) -> Any:
    """The closure definition a seal was made with: 1 when the entry predates the field
    (whole columns), else the recorded number (``model.parts.CLOSURE_DEFINITION``)."""
    closure = entry.get("closure")
    return closure.get("definition", 1) if isinstance(closure, dict) else 1


def closure_architecture(net: ProgressiveNet, task: str) -> dict[str, Any]:
    """What gives a closure's tensors their meaning: the spec's input, column template and
    lateral policy, and the closure's columns, adapters and head, as plain data."""
    closure = net.closure(task)
    spec = net.spec.to_dict()
    columns = {c.index: c for c in net.column_info}
    return {"input": spec["input"], "column": spec["column"], "lateral": spec["lateral"],
            "columns": [asdict(columns[k]) for k in closure.columns],
            "adapters": [asdict(net.adapter_info[a]) for a in closure.adapters],
            "head": asdict(net.task_info[task])}


def first_difference(before: Any, after: Any, path: str = "") -> str | None:
    """``lateral.activation: 'relu' -> 'tanh'``: the first place two plain values differ."""
    if isinstance(before, Mapping) and isinstance(after, Mapping):
        for key in list(before) + [k for k in after if k not in before]:
            found = first_difference(before.get(key), after.get(key),
                                     f"{path}.{key}" if path else str(key))
            if found:
                return found
        return None
    if (isinstance(before, list) and isinstance(after, list)
            and len(before) == len(after)):
        for i, (a, b) in enumerate(zip(before, after, strict=True)):
            found = first_difference(a, b, f"{path}[{i}]")
            if found:
                return found
        return None
    return None if before == after else f"{path or 'value'}: {before!r} -> {after!r}"


def closure_findings(net: ProgressiveNet, task: str, entry: Mapping[str, Any],
                     where: str = "") -> tuple[list[str], list[str]]:
    """What differs between a task's closure now and its seal, one sentence each.

    Returns (moved, evidence): tensors that changed, appeared or vanished; and, when
    every tensor matches but the recorded closure digest does not, a note that the seal
    entry itself was edited.
    """
    version = entry.get("version")
    if task not in net.task_info:
        return [f"task {task!r} of seal v{version} is no longer in the network"], []
    definition = closure_definition(entry)
    if definition not in CLOSURE_DEFINITIONS:
        return [], [f"seal v{version} of task {task!r} draws its closure by definition "
                    f"{definition!r}, which this colonnade does not know; check it with the "
                    f"colonnade that made it"]
    state = net.closure_state(task, definition)  # as the seal drew it
    whole, per = closure_digests(state)
    recorded = _recorded_tensors(entry)
    moved = []
    for key in sorted(recorded):
        if key not in per:
            moved.append(f"tensor {key!r} of the closure sealed in seal v{version} is no "
                         f"longer in the network")
        elif per[key] != recorded[key]:
            moved.append(f"tensor {key!r}{where} differs from its digest in seal v{version}")
    for key in sorted(set(per) - set(recorded)):
        moved.append(f"tensor {key!r} joined the closure of task {task!r} after seal "
                     f"v{version}")
    evidence = []
    closure = entry.get("closure") if isinstance(entry.get("closure"), dict) else {}
    if "architecture" in closure:  # seals made before it was recorded have none
        changed = first_difference(closure["architecture"], closure_architecture(net, task))
        if changed:
            moved.append(f"the architecture of its closure changed since seal v{version} "
                         f"({changed})")
    if not moved and whole != closure.get("sha256"):
        evidence.append(f"the closure digest recorded in seal v{version} of task {task!r} "
                        f"does not match its own per-tensor digests, so the manifest entry "
                        f"was edited")
    return moved, evidence


def verify_unchanged(net: ProgressiveNet) -> None:
    """Refuse to save a network in which a sealed closure no longer matches its seal."""
    for task, entry in sealed_tasks(net).items():
        moved, evidence = closure_findings(net, task, entry)
        if moved or evidence:
            first = (moved or evidence)[0]
            raise SealedError(
                f"refusing to save: task {task!r} is sealed (seal v{entry.get('version')}) "
                f"but {first}; reload the workspace, or unseal the task first with "
                f"'colonnade unseal WS --task {task} --reason TEXT'")
