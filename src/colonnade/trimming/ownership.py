"""What a trim may touch: the task's own adapters and layers, never another task's.

An adapter belongs to the closure of every task that reaches it, so only adapters that no
other task depends on are the task's own; a pruned adapter's mean may be folded only into
a bias of a part no other task depends on. A sealed task is refused outright.
"""

from __future__ import annotations

import torch

from ..errors import SealedError, UsageError
from ..model.guard import sealed_tasks
from ..model.network import ProgressiveNet
from .usage import task_adapters

__all__ = ["refuse_sealed", "dependents_of", "owned_adapters", "own_parts", "param_count",
           "fold_targets"]


def refuse_sealed(net: ProgressiveNet, task: str, action: str = "trim") -> None:
    """One sentence, SealedError, when ``task`` is under an active seal."""
    entry = sealed_tasks(net).get(task)
    if entry is not None:
        raise SealedError(
            f"cannot {action} task {task!r}: it is sealed (seal v{entry.get('version')} of "
            f"{entry.get('time')}), and trimming works only on unsealed tasks; unseal it "
            f"first with 'colonnade unseal WS --task {task} --reason TEXT'")


def dependents_of(net: ProgressiveNet, task: str) -> dict[str, list[str]]:
    """Part id -> the other tasks whose closure holds it."""
    out: dict[str, list[str]] = {}
    for other in net.tasks:
        if other == task:
            continue
        c = net.closure(other)
        for part in ([f"column:{k}" for k in c.columns] + [f"adapter:{a}" for a in c.adapters]
                     + [f"head:{c.head}"]):
            out.setdefault(part, []).append(other)
    return out


def owned_adapters(net: ProgressiveNet, task: str) -> tuple[list[str], dict[str, str]]:
    """Adapters feeding ``task`` that only it depends on, and why the others stay."""
    dependents = dependents_of(net, task)
    owned, kept = [], {}
    for key, _, _ in task_adapters(net, task):
        others = dependents.get(f"adapter:{key}")
        if others:
            kept[key] = (f"task {', '.join(repr(t) for t in others)} also depends on it, "
                         f"so removing it would change that output")
        else:
            owned.append(key)
    return owned, kept


def own_parts(net: ProgressiveNet, task: str) -> list[str]:
    """The trainable parts fine-tuning may touch: the task's column, head and adapters."""
    info = net.task(task)
    parts = [f"head:{task}"] + [f"adapter:{k}" for k, _, _ in task_adapters(net, task)]
    if info.mode == "column":
        parts.insert(0, f"column:{info.column}")
    dependents = dependents_of(net, task)
    for part in parts:
        if part in dependents:
            kind, _, name = part.partition(":")
            raise UsageError(f"cannot fine-tune {kind} {name} of task {task!r}: task "
                             f"{dependents[part][0]!r} depends on it; trim without --finetune")
    return parts


def param_count(module: torch.nn.Module) -> int:
    return sum(p.numel() for p in module.parameters())


def fold_targets(net: ProgressiveNet, task: str) -> dict[str, tuple[str, torch.nn.Module]]:
    """Layers whose bias may take a pruned adapter's mean: layer -> (part, weighted layer).

    Only layers of parts no other task depends on, and only layers with a bias.
    """
    info = net.task(task)
    dependents = dependents_of(net, task)
    out: dict[str, tuple[str, torch.nn.Module]] = {}
    if getattr(net.heads[task], "bias", None) is not None:
        out["head"] = (f"head:{task}", net.heads[task])
    column = f"column:{info.column}"
    if column not in dependents:
        for b, block in enumerate(net.columns[info.column].blocks):
            if getattr(block.weighted, "bias", None) is not None:
                out[f"block {b}"] = (column, block.weighted)
    return out
