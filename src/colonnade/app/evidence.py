"""Workspace verbs of the evidence: ``seal``, ``unseal`` and ``check``."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from ..errors import ColonnadeError, UsageError
from ..evidence.seal import load_probe, seal_task, unseal_task
from ..evidence.verify import CheckReport, check_seal, probe_for
from ..files.store import WEIGHTS
from ..model.device import resolve_device
from ..model.guard import sealed_tasks
from .record import match_data_file, verify_record
from .transaction import read_workspace, writing

__all__ = ["seal_workspace", "unseal_workspace", "check_workspace"]


def seal_workspace(folder: str | Path, task: str, probe: str | Path,
                   device: str | None = None, labels: str | Path | None = None,
                   by: str | None = None, reason: str | None = None,
                   sign: str | Path | None = None, accept_low_accuracy: bool = False,
                   require_signed: bool = False) -> dict[str, Any]:
    """``colonnade seal``: seal a task of a workspace on a probe, commit once.

    ``probe`` is a labelled file or class folder, or a .npy of samples with ``labels``;
    its decoded samples and labels are kept in the workspace (``evidence.kept_probe``).
    Sealing a task again needs ``reason``; the returned ``changes`` say what differs from
    the previous seal.
    """
    with writing(folder, "seal", by=by, reason=reason, sign=sign) as tx:
        net = tx.net
        net.task(task)
        net.to(resolve_device(device))
        entry = seal_task(net, task, load_probe(probe, net, task, relative_to=folder,
                                                labels=labels),
                          reason=tx.reason, accept_low_accuracy=accept_low_accuracy,
                          require_signed=require_signed)
        step = net.meta["history"][-1]
        return {**entry, "changes": step.get("changes")}


def unseal_workspace(folder: str | Path, task: str, reason: str, by: str | None = None,
                     sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade unseal``: lift a task's seal with a recorded reason, commit once."""
    with writing(folder, "unseal", by=by, reason=reason, sign=sign) as tx:
        return unseal_task(tx.net, task, reason)


def check_workspace(folder: str | Path, task: str | None = None,
                    tolerance: float | None = None, probe: str | Path | None = None,
                    trust: list[str | Path] | None = None, data: str | Path | None = None,
                    probe_labels: str | Path | None = None) -> CheckReport:
    """``colonnade check``: the record first (chain, files, signatures against ``trust``),
    then the newest seal of every sealed task (or of one); with ``data``, whether that
    file is the one ``task`` was trained on.

    Each seal's probe is read from its copy kept in the workspace; ``probe`` (with
    ``probe_labels`` for a .npy) names another file for ``task``. A path written in the
    manifest is never opened (``evidence.verify.probe_for``).
    """
    if tolerance is not None and not (tolerance >= 0 and math.isfinite(tolerance)):
        raise UsageError(f"--tolerance must be a finite number of at least 0, got {tolerance}")
    if probe is not None and task is None:
        raise UsageError("--probe applies to one task; pass --task NAME with it")
    if probe_labels is not None and probe is None:
        raise UsageError("--probe-labels goes with --probe FILE.npy; pass both")
    if data is not None and task is None:
        raise UsageError("--data applies to one task; pass --task NAME with it")
    folder = Path(folder)
    record = verify_record(folder, trust)
    if record.entries == 0 and not record.passed:
        return CheckReport(str(folder), [], record=record)  # no history could be read at all
    if data is not None:
        matched = match_data_file(folder, task, data) if record.passed else None
        return CheckReport(str(folder), [], record=record, data=matched)
    try:
        net = read_workspace(folder, strict=False)
    except ColonnadeError as exc:  # an adopted model's bytes changed: DataError
        if record.passed:
            raise
        return CheckReport(str(folder), [], [f"the seals could not be checked ({exc})"],
                           record=record)
    mismatched = net.meta.get("_mismatched", [])
    sealed = sealed_tasks(net)
    if task is not None:
        net.task(task)
        if task not in sealed:
            raise UsageError(f"task {task!r} has no active seal; seal it with 'colonnade seal "
                             f"{folder} --task {task} --probe FILE'")
        names = [task]
    else:
        names = list(sealed)
    if not names and record.passed and not trust:
        raise UsageError(f"no task in {folder} is sealed, so there is nothing to check; seal "
                         f"one with 'colonnade seal {folder} --task NAME --probe FILE'")
    where = f" in {WEIGHTS}"
    results = []
    for name in names:
        entry = sealed[name]
        try:
            found, problem = probe_for(net, name, entry, probe, probe_labels)
        except (KeyError, TypeError, AttributeError):
            found, problem = None, None  # a malformed entry; check_seal names it
        results.append(check_seal(net, name, entry, found, problem, tolerance, where))
    notes = [f"{name} no longer matches the SHA-256 recorded in the manifest, so it was "
             f"changed outside colonnade" for name in mismatched]
    return CheckReport(str(folder), results, notes, record=record)
