"""Seals: a task's certificate, and the guard that refuses to write into a sealed closure.

A seal records, for one task, a digest of every tensor its output depends on (its
closure), the probe file's digest, the reference logits on the probe (kept in the
workspace file ``seals.safetensors``) with their digest, metrics on the probe, the
environment, and how the reference was computed (batch size, thread count, dtype,
device), so that ``verify.check_seal`` can repeat exactly that computation: bit-exactness
is a property of the same computation, not of the same math.

A seal is a software regression check, not a safety certification.

Seals live in ``net.meta["seals"][task]`` as a list of versions; sealing again appends
a version, unsealing marks the newest one and records the reason in the history. The
guard (``guard``, ``guard_state``, ``verify_unchanged``) is called from the network's one
choke point for trainable parts, from ``load_state_dict`` and from ``store.save``.
"""

from __future__ import annotations

import contextlib
import os
import platform
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from . import __version__
from .data import load_task_data
from .digest import closure_digests, file_digest, record_digest, tensor_digest
from .errors import DataError, SealedError, UsageError
from .fit import EVAL_BATCH, task_logits
from .network import ProgressiveNet
from .store import now

__all__ = ["SEALS_FILE", "Probe", "load_probe", "probe_metrics", "environment",
           "reference_logits", "computation_context", "seal_task", "unseal_task", "seals_of",
           "latest_seal", "sealed_tasks", "is_sealed", "sealed_parts", "guard", "guard_state",
           "verify_unchanged", "closure_findings", "entry_digest", "reference_key",
           "seal_workspace", "unseal_workspace"]

SEALS_FILE = "seals.safetensors"
# Fields not covered by a seal entry's own digest: the digest itself, and the one field
# that unsealing writes later.
_UNSIGNED = ("entry_sha256", "unsealed")


@dataclass
class Probe:
    """A probe set as read from its file, with the file's SHA-256."""

    x: torch.Tensor
    y: torch.Tensor
    sha256: str
    path: str  # as recorded in the seal (relative to the workspace where possible)


def load_probe(path: str | Path, net: ProgressiveNet, task: str,
               relative_to: str | Path | None = None) -> Probe:
    """Read a labelled probe file for ``task``; every sample is kept, in file order."""
    info = net.task(task)
    data = load_task_data(path, net.input_shape, classes=info.classes, need_labels=True,
                          split=False)
    recorded = str(path)
    if relative_to is not None:
        try:
            recorded = os.path.relpath(os.path.abspath(path), os.path.abspath(relative_to))
        except ValueError:  # another drive on Windows: keep the path as given
            pass
    return Probe(data.x, data.y, file_digest(path), recorded)


def probe_metrics(logits: torch.Tensor, y: torch.Tensor, classes: int) -> dict[str, Any]:
    """Accuracy, per-class recall (None for a class absent from the probe), confusion.

    Confusion rows are true classes, columns predicted classes.
    """
    pred = logits.argmax(1)
    confusion = torch.zeros(classes, classes, dtype=torch.int64)
    confusion.index_put_((y, pred), torch.ones_like(y), accumulate=True)
    support = confusion.sum(1)
    recall = [float(confusion[c, c]) / float(support[c]) if support[c] > 0 else None
              for c in range(classes)]
    total = int(support.sum())
    return {"accuracy": float(confusion.trace()) / total if total else None,
            "recall": recall, "confusion": confusion.tolist()}


def environment() -> dict[str, str]:
    """The software and hardware stack a reference was computed on."""
    return {"colonnade": __version__, "torch": str(torch.__version__), "numpy": np.__version__,
            "python": platform.python_version(), "platform": platform.platform(),
            "machine": platform.machine()}


@contextlib.contextmanager
def computation_context(threads: int) -> Iterator[None]:
    """Run with torch's intra-op thread count set as a seal recorded it."""
    before = torch.get_num_threads()
    if threads != before:
        torch.set_num_threads(int(threads))
    try:
        yield
    finally:
        if torch.get_num_threads() != before:
            torch.set_num_threads(before)


def reference_logits(net: ProgressiveNet, task: str, x: torch.Tensor,
                     computation: Mapping[str, Any]) -> torch.Tensor:
    """The task's probe logits, computed exactly as ``computation`` says."""
    with computation_context(int(computation["threads"])):
        return task_logits(net, task, x, batch_size=int(computation["batch_size"]))


def reference_key(task: str, version: int) -> str:
    return f"{task}/v{version}"


def entry_digest(entry: Mapping[str, Any]) -> str:
    """A seal entry's digest over its own content: catches hand edits, not a signature."""
    return record_digest(entry, skip=_UNSIGNED)


# ----------------------------------------------------------------------------- queries
def seals_of(net: ProgressiveNet, task: str) -> list[dict[str, Any]]:
    """Every seal version of a task, oldest first."""
    seals = net.meta.get("seals") or {}
    versions = seals.get(task) if isinstance(seals, dict) else None
    return list(versions) if isinstance(versions, list) else []


def latest_seal(net: ProgressiveNet, task: str) -> dict[str, Any] | None:
    versions = seals_of(net, task)
    return versions[-1] if versions else None


def sealed_tasks(net: ProgressiveNet) -> dict[str, dict[str, Any]]:
    """Tasks under an active seal, with their newest seal entry, in growth order."""
    seals = net.meta.get("seals") or {}
    if not isinstance(seals, dict):
        return {}
    order = {t: i for i, t in enumerate(net.tasks)}
    out = {}
    for task in sorted(seals, key=lambda t: order.get(t, len(order))):
        entry = latest_seal(net, task)
        if isinstance(entry, dict) and not entry.get("unsealed"):
            out[task] = entry
    return out


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


# ----------------------------------------------------------------------------- the guard
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
    state = net.closure_state(task)
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


# ----------------------------------------------------------------------------- seal / unseal
def _closure_dtype(state: Mapping[str, torch.Tensor]) -> str:
    for value in state.values():
        if value.is_floating_point():
            return str(value.dtype).removeprefix("torch.")
    return "none"


def seal_task(net: ProgressiveNet, task: str, probe: Probe,
              batch_size: int = EVAL_BATCH) -> dict[str, Any]:
    """Seal ``task`` on ``probe``: record the entry, keep the reference logits, log it."""
    info = net.task(task)
    if probe.x.shape[0] == 0:
        raise DataError(f"{probe.path}: the probe holds no samples")
    if probe.y.numel() != probe.x.shape[0]:
        raise DataError(f"{probe.path}: a probe needs one label per sample to compute the "
                        f"seal's metrics")
    closure = net.closure(task)
    parts = ([f"column:{k}" for k in closure.columns]
             + [f"adapter:{a}" for a in closure.adapters] + [f"head:{task}"])
    if any(net.is_trainable(p) for p in parts):
        raise UsageError(f"task {task!r} still has trainable parts; call net.freeze() before "
                         f"sealing it")
    state = net.closure_state(task)
    whole, per = closure_digests(state)
    computation = {"batch_size": int(batch_size), "threads": torch.get_num_threads(),
                   "dtype": _closure_dtype(state), "device": str(net.device),
                   "call": "forward"}
    logits = reference_logits(net, task, probe.x, computation).contiguous()
    version = len(seals_of(net, task)) + 1
    key = reference_key(task, version)
    entry: dict[str, Any] = {
        "version": version,
        "task": task,
        "time": now(),
        "closure": {"sha256": whole, "columns": list(closure.columns),
                    "adapters": list(closure.adapters), "head": closure.head,
                    "tensors": per},
        "probe": {"path": probe.path, "sha256": probe.sha256,
                  "samples": int(probe.x.shape[0])},
        "reference": {"file": SEALS_FILE, "key": key, "sha256": tensor_digest(key, logits),
                      "shape": list(logits.shape),
                      "dtype": str(logits.dtype).removeprefix("torch.")},
        "metrics": probe_metrics(logits, probe.y, info.classes),
        "computation": computation,
        "environment": environment(),
        "unsealed": None,
    }
    entry["entry_sha256"] = entry_digest(entry)
    net.meta.setdefault("seals", {}).setdefault(task, []).append(entry)
    net.attachments.setdefault(SEALS_FILE, {})[key] = logits.cpu()
    net.meta["history"].append({"step": "task_sealed", "task": task, "version": version,
                                "time": entry["time"], "closure_sha256": whole})
    return entry


def unseal_task(net: ProgressiveNet, task: str, reason: str) -> dict[str, Any]:
    """Lift a task's active seal, recording why; the only way past the guard."""
    net.task(task)
    reason = (reason or "").strip()
    if not reason:
        raise UsageError("unsealing needs a reason; pass --reason TEXT saying why the "
                         "task's certificate is lifted")
    entry = sealed_tasks(net).get(task)
    if entry is None:
        raise UsageError(f"task {task!r} is not sealed, so there is nothing to unseal")
    when = now()
    entry["unsealed"] = {"time": when, "reason": reason}
    step = {"step": "task_unsealed", "task": task, "version": entry.get("version"),
            "time": when, "reason": reason}
    net.meta["history"].append(step)
    return step


# ----------------------------------------------------------------------------- workspace
def seal_workspace(folder: str | Path, task: str, probe: str | Path,
                   device: str | None = None) -> dict[str, Any]:
    """``colonnade seal``: seal a task of a workspace on a probe file, save atomically."""
    from .growth import resolve_device
    from .store import load, save

    net = load(folder)
    net.task(task)
    net.to(resolve_device(device))
    entry = seal_task(net, task, load_probe(probe, net, task, relative_to=folder))
    save(net, folder)
    return entry


def unseal_workspace(folder: str | Path, task: str, reason: str) -> dict[str, Any]:
    """``colonnade unseal``: lift a task's seal with a recorded reason, save atomically."""
    from .store import load, save

    net = load(folder)
    step = unseal_task(net, task, reason)
    save(net, folder)
    return step
