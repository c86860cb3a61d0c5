"""What a diff compares: a workspace's state now, or as its own record says it was.

``snapshot_of(net)`` takes everything from a loaded network: spec, tasks, parts, every
tensor, seals and history. ``snapshot_at(net, n)`` rebuilds the state after history entry
``n`` from the record alone: the architecture is replayed backwards from today's (steps
after ``n`` undone: tasks added later removed, adapters pruned or merged later put back,
seals made or lifted later undone), and tensor values are known only through the
per-tensor digests of the seals active then. Old weights are not kept, so such a
snapshot says which tensors it can vouch for and never invents a value.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import torch

from ..errors import UsageError
from ..model.digest import closure_digests
from ..model.guard import seals_of
from ..model.network import ProgressiveNet
from ..model.seal_index import active_seals

__all__ = ["Snapshot", "snapshot_of", "snapshot_at", "GROWTH_STEPS", "entry_index"]

GROWTH_STEPS = ("column_added", "head_added")
_REMOVING = ("adapter_pruned", "adapters_merged")


@dataclass
class Snapshot:
    """A workspace state as plain data; ``tensors`` is None when only digests are known."""

    label: str
    spec: dict[str, Any]
    architecture: dict[str, Any]
    seals: dict[str, list[dict[str, Any]]]
    history: list[dict[str, Any]]
    digests: dict[str, str]
    tensors: Mapping[str, torch.Tensor] | None = None
    records: dict[str, Any] = field(default_factory=dict)
    net: ProgressiveNet | None = None  # modules with the snapshot's shapes, for costs

    @property
    def tasks(self) -> dict[str, dict[str, Any]]:
        return {t["name"]: t for t in self.architecture.get("tasks", [])}

    @property
    def adapters(self) -> dict[str, dict[str, Any]]:
        return {a["key"]: a for a in self.architecture.get("adapters", [])}

    def keys(self) -> set[str]:
        """Every tensor key the state has, whether or not its value is known."""
        if self.tensors is not None:
            return set(self.tensors)
        if self.net is not None:
            return set(self.net.state_dict())
        return set(self.digests)

    def active_seal(self, task: str) -> dict[str, Any] | None:
        return active_seals(self.seals, [task]).get(task)


def snapshot_of(net: ProgressiveNet, label: str) -> Snapshot:
    """Everything a loaded workspace holds, tensors included."""
    state = {k: v.detach().cpu() for k, v in net.state_dict().items()}
    _whole, per = closure_digests(state)
    seals = {t: copy.deepcopy(seals_of(net, t)) for t in (net.meta.get("seals") or {})}
    return Snapshot(label, net.spec.to_dict(), net.architecture(), seals,
                    list(net.meta.get("history") or []), per, state,
                    copy.deepcopy(net.meta.get("records") or {}), net)


def entry_index(history: list[Any], entry: str) -> int:
    """The number of entries up to and including ``entry``: a 1-based number as the
    report's history numbers them, or the leading hex digits of an entry's digest."""
    text = str(entry).strip()
    if text.isdigit():
        n = int(text)
        if not 1 <= n <= len(history):
            raise UsageError(f"--since {text}: the history has entries 1 to {len(history)}; "
                             f"pick one of those (see the report's History section)")
        return n
    matches = [i for i, e in enumerate(history, start=1) if isinstance(e, Mapping)
               and any(str(e.get(k) or "").startswith(text.lower())
                       for k in ("digest", "entry_sha256", "sha256")) and len(text) >= 6]
    if len(matches) != 1:
        raise UsageError(f"--since {text}: give an entry number from 1 to {len(history)} "
                         f"(or at least 6 leading hex digits of one entry's digest)")
    return matches[0]


def _undo(arch: dict[str, Any], seals: dict[str, list[dict[str, Any]]],
          later: list[Mapping[str, Any]]) -> None:
    """Undo, newest first, what the entries in ``later`` did to ``arch`` and ``seals``."""
    for e in reversed(later):
        step, task = e.get("step"), e.get("task")
        if step in GROWTH_STEPS:
            task_row = next((t for t in arch["tasks"] if t["name"] == task), None)
            arch["tasks"] = [t for t in arch["tasks"] if t["name"] != task]
            if step == "column_added" and task_row is not None:
                col = task_row["column"]
                arch["columns"] = [c for c in arch["columns"] if c["index"] != col]
                arch["adapters"] = [a for a in arch["adapters"] if a.get("column") != col]
            arch["adapters"] = [a for a in arch["adapters"] if a.get("head") != task]
            seals.pop(task, None)
        elif step in _REMOVING:
            names = set(e.get("adapters") or [])
            for a in arch["adapters"]:
                if a["key"] in names:
                    a["state"] = "live"
            if step == "adapters_merged":  # the joint adapter did not exist yet
                arch["adapters"] = [a for a in arch["adapters"] if not (
                    a.get("kind") == "joint"
                    and set((a.get("extra") or {}).get("replaces") or []) & names)]
        elif step == "task_retired":
            for t in arch["tasks"]:
                if t["name"] == task:
                    t["state"] = "live"
        elif step == "task_sealed":
            versions = seals.get(task) or []
            seals[task] = [s for s in versions if s.get("version") != e.get("version")]
        elif step == "task_unsealed":
            for s in seals.get(task) or []:
                if s.get("version") == e.get("version"):
                    s["unsealed"] = None


def snapshot_at(net: ProgressiveNet, n: int, label: str) -> Snapshot:
    """The workspace as it stood after history entry ``n`` (1-based), from its record."""
    history = list(net.meta.get("history") or [])
    recorded = history[n - 1] if 0 < n <= len(history) else None
    seals = {t: copy.deepcopy(seals_of(net, t)) for t in (net.meta.get("seals") or {})}
    if isinstance(recorded, Mapping) and isinstance(recorded.get("architecture"), dict):
        arch = copy.deepcopy(recorded["architecture"])  # the record states it: trust it
    else:
        arch = copy.deepcopy(net.architecture())
    _undo(arch, seals, [e for e in history[n:] if isinstance(e, Mapping)])
    seals = {t: v for t, v in seals.items() if v}
    spec = (copy.deepcopy(recorded["spec"]) if isinstance(recorded, Mapping)
            and isinstance(recorded.get("spec"), dict) else net.spec.to_dict())
    digests: dict[str, str] = {}
    for versions in seals.values():
        for s in versions:
            if not s.get("unsealed"):
                digests.update((s.get("closure") or {}).get("tensors") or {})
    try:
        shaped = ProgressiveNet.from_architecture(net.spec, arch)
    except Exception:  # costs of the earlier point are then left out, not guessed
        shaped = None
    return Snapshot(label, spec, arch, seals, history[:n], digests, None, {}, shaped)
