"""Seals: a task's certificate, made from its closure and a probe set.

A seal records, for one task, a digest of every tensor its output depends on (its
closure), the probe's samples (kept in the workspace, ``kept_probe``) and the digest
of its source, the reference logits on the probe (kept in the workspace file
``seals.safetensors``) with their digest, metrics on the probe, the
environment, and how the reference was computed (batch size, thread count, dtype,
device), so that ``verify.check_seal`` can repeat exactly that computation: bit-exactness
is a property of the same computation, not of the same math.

A seal is a software regression check, not a safety certification.

Seals live in ``net.meta["seals"][task]`` as a list of versions; sealing again appends
a version, unsealing marks the newest one and records the reason in the history. The guard
that refuses writes into a sealed closure is a model-level invariant and lives in
``colonnade.model.guard``; the verbs that load, seal and commit a workspace live in
``colonnade.app``.
"""

from __future__ import annotations

import contextlib
import os
import platform
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .._version import __version__
from ..clock import now
from ..errors import DataError, UsageError
from ..model.digest import bytes_digest, closure_digests, record_digest, tensor_digest
from ..model.guard import closure_architecture, latest_seal, sealed_tasks, seals_of
from ..model.network import ProgressiveNet
from ..training.data import load_for_spec
from ..training.datasets import Rows
from ..training.fit import EVAL_BATCH, task_logits
from ..training.sources import source_digest
from .kept_probe import KEPT_FORMAT, kept_name, pack_probe, too_large_to_keep, unpack_probe

__all__ = ["SEALS_FILE", "Probe", "load_probe", "probe_metrics", "environment",
           "reference_logits", "computation_context", "seal_task", "unseal_task",
           "entry_digest", "reference_key", "seal_changes", "LOW_ACCURACY_MARGIN"]

SEALS_FILE = "seals.safetensors"
# Fields not covered by a seal entry's own digest: the digest itself, and the one field
# that unsealing writes later.
_UNSIGNED = ("entry_sha256", "unsealed")
# A policy choice of this project, not a measured or published figure: a probe drawn from
# a task's own data lands within a few points of its validation accuracy, so a probe this
# far below it is most likely another task's file. ``accept_low_accuracy`` overrides it.
LOW_ACCURACY_MARGIN = 0.2


@dataclass
class Probe:
    """A probe set as read, with the SHA-256 of its source (a file, a folder, a .npy and
    its labels file, or arrays in memory).

    A seal keeps its samples inside the workspace (``kept_probe``), so that the workspace
    checks on its own wherever it is copied; ``path`` and ``labels`` say where it was
    read from, for information only.
    """

    x: torch.Tensor | Rows  # Rows: a probe larger than memory, read in batches
    y: torch.Tensor
    sha256: str
    path: str  # where it was read from, kept in the seal for information only
    labels: str | None = None  # a .npy probe's labels file, recorded like ``path``


def load_probe(path: str | Path, net: ProgressiveNet, task: str,
               relative_to: str | Path | None = None, labels: str | Path | None = None,
               ) -> Probe:
    """Read a labelled probe for ``task`` (a file, a class folder, or a .npy with its
    ``labels``); every sample is kept, in file order. Labels by name map onto the
    task's class names."""
    info = net.task(task)
    data = load_for_spec(path, net.spec, classes=info.classes, class_names=info.class_names,
                         need_labels=True, split=False, labels=labels)
    return Probe(data.x, data.y, source_digest(path, labels), _recorded(path, relative_to),
                 None if labels is None else _recorded(labels, relative_to))


def _recorded(path: str | Path, relative_to: str | Path | None) -> str:
    """A path as the seal records it: relative to the workspace where possible."""
    if relative_to is None:
        return str(path)
    try:
        return os.path.relpath(os.path.abspath(path), os.path.abspath(relative_to))
    except ValueError:  # another drive on Windows: keep the path as given
        return str(path)


# A seal records its confusion matrix for at most this many classes: the matrix grows
# with the square of the class count (65,536 classes would be 34 GB to build and 4
# billion values in the manifest), while accuracy and per-class recall, kept for every
# task, grow only with the count. Our own bound: a 100 x 100 matrix is 10,000 values.
CONFUSION_MAX_CLASSES = 100


def probe_metrics(logits: torch.Tensor, y: torch.Tensor, classes: int) -> dict[str, Any]:
    """Accuracy, per-class recall (None for a class absent from the probe), and the
    confusion matrix (rows true classes, columns predicted; None above
    ``CONFUSION_MAX_CLASSES`` classes)."""
    pred = logits.argmax(1)
    support = torch.bincount(y, minlength=classes)
    hits = torch.bincount(y[pred == y], minlength=classes)
    recall = [float(hits[c]) / float(support[c]) if support[c] > 0 else None
              for c in range(classes)]
    total = int(support.sum())
    confusion = None
    if classes <= CONFUSION_MAX_CLASSES:
        matrix = torch.zeros(classes, classes, dtype=torch.int64)
        matrix.index_put_((y, pred), torch.ones_like(y), accumulate=True)
        confusion = matrix.tolist()
    return {"accuracy": float(hits.sum()) / total if total else None,
            "recall": recall, "confusion": confusion}


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


# ----------------------------------------------------------------------------- seal / unseal
def _closure_dtype(state: Mapping[str, torch.Tensor]) -> str:
    for value in state.values():
        if value.is_floating_point():
            return str(value.dtype).removeprefix("torch.")
    return "none"


def seal_changes(previous: Mapping[str, Any], entry: Mapping[str, Any]) -> list[str]:
    """What differs between a task's previous seal and a new one, one phrase each."""
    def get(e: Mapping[str, Any], section: str, key: str) -> Any:
        part = e.get(section)
        return part.get(key) if isinstance(part, Mapping) else None

    out = []
    before, after = get(previous, "closure", "sha256"), get(entry, "closure", "sha256")
    out.append("the closure is unchanged" if before == after else
               f"the closure digest changed ({str(before)[:16]}... to {str(after)[:16]}...)")
    before, after = get(previous, "probe", "sha256"), get(entry, "probe", "sha256")
    out.append("the probe is the same file" if before == after else
               f"the probe is another file ({str(before)[:16]}... to {str(after)[:16]}...)")
    before, after = get(previous, "metrics", "accuracy"), get(entry, "metrics", "accuracy")
    out.append(f"probe accuracy {before} to {after}" if before != after
               else f"probe accuracy unchanged at {after}")
    return out


def _low_accuracy(net: ProgressiveNet, task: str, accuracy: float | None) -> str | None:
    record = (net.meta.get("records") or {}).get(task)
    val = record.get("val_accuracy") if isinstance(record, dict) else None
    if accuracy is None or not isinstance(val, (int, float)):
        return None
    if accuracy < val - LOW_ACCURACY_MARGIN:
        return (f"the probe accuracy {accuracy:.4f} is far below the task's validation "
                f"accuracy {val:.4f}, so the probe is probably not this task's data; check "
                f"the file, or pass --accept-low-accuracy to seal on it anyway")
    return None


def seal_task(net: ProgressiveNet, task: str, probe: Probe,
              batch_size: int = EVAL_BATCH, reason: str | None = None,
              accept_low_accuracy: bool = False, require_signed: bool = False,
              ) -> dict[str, Any]:
    """Seal ``task`` on ``probe``: record the entry, keep the reference logits, log it.

    Sealing a task that has a seal already needs a ``reason`` and records what differs
    from the previous seal; a probe accuracy far below the validation accuracy is refused
    unless ``accept_low_accuracy``. ``require_signed`` asks that every later step of the
    record be signed. Nothing is changed when it refuses.
    """
    info = net.task(task)
    if info.state != "live":
        raise UsageError(f"task {task!r} is retired; a retired task is not sealed")
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
    # The samples are kept in the workspace, and the reference is computed on the kept
    # copy itself, so what ``check`` reads back is exactly what the seal ran on.
    too_large = too_large_to_keep(probe.x)
    kept = None if too_large else pack_probe(probe.x, probe.y)
    x, y = ((probe.x, probe.y) if kept is None
            else unpack_probe(kept, net.input_shape, info.classes, probe.path))
    logits = reference_logits(net, task, x, computation).contiguous()
    version = len(seals_of(net, task)) + 1
    key = reference_key(task, version)
    probe_entry: dict[str, Any] = (
        {"not_kept": too_large} if kept is None else
        {"file": kept_name(kept), "format": KEPT_FORMAT, "file_sha256": bytes_digest(kept)})
    probe_entry.update({"source": probe.path,
                        **({"source_labels": probe.labels} if probe.labels else {}),
                        "sha256": probe.sha256, "samples": int(x.shape[0])})
    entry: dict[str, Any] = {
        "version": version,
        "task": task,
        "time": now(),
        "closure": {"definition": closure.definition, "sha256": whole,
                    "columns": list(closure.columns),
                    "blocks": {str(k): closure.depth(k) for k in closure.columns},
                    "adapters": list(closure.adapters), "head": closure.head,
                    "tensors": per, "architecture": closure_architecture(net, task)},
        "probe": probe_entry,
        "reference": {"file": SEALS_FILE, "key": key, "sha256": tensor_digest(key, logits),
                      "shape": list(logits.shape),
                      "dtype": str(logits.dtype).removeprefix("torch.")},
        "metrics": probe_metrics(logits, y, info.classes),
        "computation": computation,
        "environment": environment(),
        "unsealed": None,
    }
    reason = (reason or "").strip() or None
    if reason is not None:
        entry["reason"] = reason
    if require_signed:
        entry["require_signed"] = True
    entry["entry_sha256"] = entry_digest(entry)
    previous = latest_seal(net, task)
    changes = seal_changes(previous, entry) if previous is not None else None
    problem = _low_accuracy(net, task, entry["metrics"]["accuracy"])
    if problem and not accept_low_accuracy:
        raise UsageError(problem)
    if changes is not None and reason is None:
        raise UsageError(f"task {task!r} was sealed before (seal v{previous.get('version')}), "
                         f"so sealing it again needs --reason TEXT; against that seal "
                         f"{', '.join(changes)}")
    net.meta.setdefault("seals", {}).setdefault(task, []).append(entry)
    net.attachments.setdefault(SEALS_FILE, {})[key] = logits.cpu()
    if kept is not None:
        net.kept_files[probe_entry["file"]] = kept
    step: dict[str, Any] = {"step": "task_sealed", "task": task, "version": version,
                            "time": entry["time"], "closure_sha256": whole,
                            "probe_sha256": probe.sha256}
    if changes is not None:
        step["changes"] = changes
    if reason is not None:
        step["reason"] = reason
    if require_signed:
        step["require_signed"] = True
    if problem:
        step["low_accuracy_accepted"] = problem.split(", so")[0]
    net.meta["history"].append(step)
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
