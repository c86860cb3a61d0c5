"""Check every seal: recompute closure digests, probe digests, probe logits and metrics.

Verdicts, per sealed task:

* ``exact``: every closure tensor, the probe file, the stored reference and the probe
  logits are bit-identical to the seal's;
* ``within T``: as exact, except that the logits differ by at most T (absolute) and every
  predicted class agrees; only with a tolerance, for checks on other hardware;
* ``moved``: a closure tensor changed, or the logits differ beyond T, or classes flipped;
* ``unverified``: the evidence needed to compare is changed or missing (the probe file,
  the stored reference, the seal entry itself, or the seal's device), so nothing can be
  said about the outputs.

Every finding is one sentence. The workspace is read with ``strict=False`` so that a
weights file changed outside colonnade can still be checked and the tensor named.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import torch

from ..errors import ColonnadeError
from ..model.digest import bytes_digest, file_digest, raw_bytes, tensor_digest
from ..model.guard import closure_findings, sealed_tasks
from ..model.network import ProgressiveNet
from ..training.data import load_for_spec
from ..training.sources import source_digest
from .kept_probe import unpack_probe
from .seal import (
    SEALS_FILE,
    Probe,
    entry_digest,
    environment,
    load_probe,
    probe_metrics,
    reference_logits,
)

__all__ = ["TaskCheck", "CheckReport", "check_seal", "check_net", "probe_for"]


@dataclass
class TaskCheck:
    """The outcome of checking one task's newest seal."""

    task: str
    version: int | None
    verdict: str
    max_abs_diff: float | None = None
    predictions_agree: bool | None = None
    samples: int | None = None
    failures: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return self.verdict == "exact" or self.verdict.startswith("within")

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class CheckReport:
    """Seal verdicts per task, and (from ``check``) the record's verdict and a data match.

    ``record`` is an ``integrity.RecordReport``; ``data`` the answer to ``--data``.
    """

    workspace: str | None
    tasks: list[TaskCheck]
    notes: list[str] = field(default_factory=list)
    record: Any = None
    data: dict[str, Any] | None = None

    @property
    def passed(self) -> bool:
        if self.record is not None and not self.record.passed:
            return False
        if self.data is not None:
            return bool(self.data.get("matches"))
        if not self.tasks:
            return self.record is not None and self.record.entries > 0
        return all(t.passed for t in self.tasks)

    def to_dict(self) -> dict[str, Any]:
        return {"workspace": self.workspace, "passed": self.passed,
                "record": None if self.record is None else self.record.to_dict(),
                "data": self.data,
                "tasks": [t.to_dict() for t in self.tasks], "notes": list(self.notes)}


def _finite_max(diff: torch.Tensor) -> float:
    if diff.numel() == 0:
        return 0.0
    value = float(diff.max())
    return math.inf if math.isnan(value) else value


def _device_for(computation: Mapping[str, Any], tolerance: float | None,
                ) -> tuple[torch.device | None, str | None]:
    """The device to repeat the computation on, or why it cannot be repeated here."""
    name = str(computation.get("device", "cpu"))
    if not name.startswith("cuda") or torch.cuda.is_available():
        try:
            return torch.device(name), None
        except RuntimeError:
            return None, f"the seal names an unknown device {name!r}"
    if tolerance is None:
        return None, (f"the reference was computed on {name}, which this machine does not "
                      f"have; check on that device, or pass --tolerance to compare on cpu")
    return torch.device("cpu"), None


def _environment_notes(env: Any) -> list[str]:
    if not isinstance(env, dict):
        return []
    here = environment()
    notes = []
    for key in ("torch", "python", "platform"):
        if key in env and env[key] != here[key]:
            notes.append(f"sealed with {key} {env[key]}, checked with {here[key]}")
    return notes


def check_seal(net: ProgressiveNet, task: str, entry: Mapping[str, Any],
               probe: Probe | None, probe_problem: str | None = None,
               tolerance: float | None = None, where: str = "") -> TaskCheck:
    """Check one seal entry against the network and a probe already read from its file.

    ``probe`` is None when the probe file could not be used; ``probe_problem`` says why.
    """
    version = entry.get("version") if isinstance(entry, Mapping) else None
    result = TaskCheck(task, version, "exact")
    moved: list[str] = []
    evidence: list[str] = []
    try:
        reference, computation = entry["reference"], entry["computation"]
        metrics, probe_entry = entry["metrics"], entry["probe"]
        for part in (entry["closure"], reference, computation, metrics, probe_entry):
            if not isinstance(part, dict):
                raise TypeError("a section that is not a mapping")
        int(computation["batch_size"]), int(computation["threads"])
    except (KeyError, TypeError, ValueError) as exc:
        result.verdict = "unverified"
        result.failures = [f"the manifest's entry for seal v{version} of task {task!r} is "
                           f"malformed (missing or bad {exc}); restore the manifest from a "
                           f"backup"]
        return result
    if entry_digest(entry) != entry.get("entry_sha256"):
        evidence.append(f"the manifest's entry for seal v{version} of task {task!r} was "
                        f"edited outside colonnade: its own SHA-256 no longer matches")
    m, e = closure_findings(net, task, entry, where)
    moved += m
    evidence += [x for x in e if not evidence]  # one sentence about an edited entry is enough
    if task not in net.task_info:
        result.verdict, result.failures = "moved", moved + evidence
        return result

    stored = net.attachments.get(str(reference.get("file", SEALS_FILE)), {}).get(
        str(reference.get("key")))
    if stored is None:
        evidence.append(f"the reference logits of seal v{version} are missing from "
                        f"{reference.get('file', SEALS_FILE)}; restore the workspace from a "
                        f"backup")
    elif tensor_digest(str(reference.get("key")), stored) != reference.get("sha256"):
        evidence.append(f"the stored reference logits of seal v{version} (key "
                        f"{reference.get('key')!r} in {reference.get('file', SEALS_FILE)}) "
                        f"changed since the seal")
        stored = None
    if probe is None:
        evidence.append(probe_problem or f"the probe of seal v{version} is not available")
    elif probe.sha256 != probe_entry.get("sha256"):
        evidence.append(f"probe file {probe.path} changed since seal v{version}: its "
                        f"SHA-256 differs from the recorded one")
        probe = None
    device, problem = _device_for(computation, tolerance)
    if problem:
        evidence.append(problem)

    bitwise = False
    if stored is not None and probe is not None and device is not None:
        before = net.device
        net.to(device)
        try:
            logits = reference_logits(net, task, probe.x, computation)
        finally:
            net.to(before)
        result.samples = int(probe.x.shape[0])
        if str(device) != str(computation.get("device")):
            result.notes.append(f"compared on {device}; the reference was computed on "
                                f"{computation.get('device')}")
        if logits.shape != stored.shape:
            moved.append(f"the probe logits have shape {list(logits.shape)}, the reference "
                         f"{list(stored.shape)}")
        else:
            exact = logits.dtype == stored.dtype and raw_bytes(logits) == raw_bytes(stored)
            diff = _finite_max((logits.double() - stored.double()).abs())
            same = logits.argmax(1) == stored.argmax(1)
            result.max_abs_diff = 0.0 if exact else diff
            result.predictions_agree = bool(same.all())
            bitwise = exact
            if not exact:
                agree = f"predicted classes agree on {int(same.sum())} of {same.numel()} samples"
                if tolerance is None:
                    moved.append(f"the probe logits are not bit-identical to the reference: "
                                 f"they differ by up to {diff:.3g}; {agree}")
                elif diff > tolerance or not result.predictions_agree:
                    moved.append(f"the probe logits differ from the reference by up to "
                                 f"{diff:.3g}, beyond the tolerance {tolerance:g} or with "
                                 f"classes changed; {agree}")
            now_metrics = probe_metrics(logits, probe.y, net.task(task).classes)
            if now_metrics["confusion"] != metrics.get("confusion"):
                moved.append(f"the probe metrics moved: accuracy "
                             f"{now_metrics['accuracy']:.4f} against "
                             f"{metrics.get('accuracy')} at seal v{version}")
    result.notes += _environment_notes(entry.get("environment"))
    result.failures = moved + evidence
    if moved:
        result.verdict = "moved"
    elif evidence:
        result.verdict = "unverified"
    elif not bitwise:
        # Equal in value is not equal in bits (-0.0 against +0.0, NaN payloads): "exact"
        # is kept for byte-identical logits; anything else passed only the tolerance.
        result.verdict = f"within {tolerance:g}"
    return result


def check_net(net: ProgressiveNet, probes: Mapping[str, Probe], tolerance: float | None = None,
              tasks: list[str] | None = None) -> CheckReport:
    """Check the sealed tasks of an in-memory network on probes already read."""
    sealed = sealed_tasks(net)
    results = [check_seal(net, t, sealed[t], probes.get(t),
                          None if t in probes else f"no probe was given for task {t!r}",
                          tolerance)
               for t in (tasks or list(sealed))]
    return CheckReport(None, results)


def _not_kept(task: str, version: Any, probe_entry: Mapping[str, Any]) -> str:
    """The one sentence for a seal that kept no copy of its probe (made before colonnade
    kept every probe, or too large to keep): the same whatever path its manifest names,
    so it reveals nothing about the files of the machine that checks it."""
    labels = (" --probe-labels LABELS.npy"
              if "labels" in probe_entry or "source_labels" in probe_entry else "")
    why = probe_entry.get("not_kept")
    why = why if isinstance(why, str) else "it was made before colonnade kept every probe"
    return (f"seal v{version} of task {task!r} keeps no copy of its probe in the workspace "
            f"({why}), and a path written in the manifest is never read; pass --task "
            f"{task} --probe FILE{labels} with the probe it was sealed on")


def _kept(net: ProgressiveNet, task: str, version: Any, probe_entry: Mapping[str, Any],
          name: str, data: bytes | None) -> tuple[Probe | None, str | None]:
    """The probe from ``data``, the bytes of the kept file ``name`` (None: not there)."""
    if data is None:
        return None, (f"the probe of seal v{version} ({name}) is not among the workspace's "
                      f"files; restore the workspace, or pass --task {task} --probe FILE")
    packed = "file_sha256" in probe_entry
    # Older seals kept a single-file probe byte for byte: its digest is the probe's own.
    want = probe_entry.get("file_sha256") if packed else probe_entry.get("sha256")
    if bytes_digest(data) != want:
        return None, (f"the probe kept as {name} changed since seal v{version}: its SHA-256 "
                      f"differs from the recorded one")
    info = net.task(task)
    try:
        if packed:
            x, y = unpack_probe(data, net.input_shape, info.classes, name)
        else:
            loaded = load_for_spec(name, net.spec, classes=info.classes,
                                   class_names=info.class_names, need_labels=True,
                                   split=False, content=data)
            x, y = loaded.x, loaded.y
    except ColonnadeError as exc:
        return None, f"the probe kept as {name} for seal v{version} cannot be used ({exc})"
    return Probe(x, y, str(probe_entry.get("sha256")), f"{name} (kept in the workspace)"), None


def _given(net: ProgressiveNet, task: str, version: Any, probe_entry: Mapping[str, Any],
           path: Path, labels: Path | None) -> tuple[Probe | None, str | None]:
    """A probe file the user named: its source digest, or the kept copy's own, must match."""
    if not path.exists() or (labels is not None and not labels.is_file()):
        missing = path if not path.exists() else labels
        return None, f"{missing}: no such probe file or folder"
    if labels is None and path.is_file() and probe_entry.get("file_sha256") is not None \
            and file_digest(path) == probe_entry.get("file_sha256"):
        # the kept copy itself, taken out of a workspace
        probe, problem = _kept(net, task, version, probe_entry, str(probe_entry.get("file")),
                               path.read_bytes())
        if probe is not None:
            probe.path = str(path)
        return probe, problem
    if source_digest(path, labels) != probe_entry.get("sha256"):
        return None, (f"probe file {path} is not the probe of seal v{version}: its SHA-256 "
                      f"differs from the recorded one")
    try:
        probe = load_probe(path, net, task, labels=labels)
    except ColonnadeError as exc:
        return None, f"probe file {path} of seal v{version} cannot be used ({exc})"
    probe.path = str(path)
    return probe, None


def probe_for(net: ProgressiveNet, task: str, entry: Mapping[str, Any],
              override: str | Path | None = None, labels: str | Path | None = None,
              ) -> tuple[Probe | None, str | None]:
    """The seal's probe, or one sentence saying why there is none.

    A seal's probe is read only from its copy kept in the workspace (the bytes the store
    loaded, ``net.kept_files``), or from ``override``, a file the user names (with
    ``labels`` for a .npy). A path written in the manifest (an older seal's ``probe.path``
    or ``labels``, a newer one's ``source``) is never opened, hashed or even tested for
    existence: a workspace may come from anyone, and such a path could name a device,
    ``/proc``, or a file whose existence is nobody's business.
    """
    version = entry.get("version")
    probe_entry = entry.get("probe") if isinstance(entry.get("probe"), Mapping) else {}
    if override is not None:
        return _given(net, task, version, probe_entry, Path(override),
                      None if labels is None else Path(labels))
    kept = probe_entry.get("file")
    if not isinstance(kept, str) or not kept:
        return None, _not_kept(task, version, probe_entry)
    return _kept(net, task, version, probe_entry, kept, net.kept_files.get(kept))
