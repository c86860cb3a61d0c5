"""The ``export`` verb and ``check --artifact``: ship tasks as one file, and prove it later.

``export_artifact`` is one transaction on the workspace: it builds the artifact in memory
(.pt, float ONNX, or int8 ONNX), runs it in its runtime on every task's probe, compares
with the workspace, refuses to write when a bar is missed, and only then writes the file
and records the export in the history with the artifact's own probe outputs. Until the
workspace commit succeeds the file sits under a temporary name beside its target, so a
failure leaves neither an unrecorded artifact nor a half-written one.
"""

from __future__ import annotations

import io
import math
import os
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .._version import __version__
from ..clock import now
from ..costing.costs import DTYPE_BYTES
from ..errors import ColonnadeError, DataError, UsageError, WorkspaceError
from ..evidence.artifact import (
    ARTIFACTS_FILE,
    DEFAULT_ACCEPT_DROP,
    EXPORT_STEP,
    agreement,
    compare_outputs,
    find_export,
    record_export,
    refusals,
)
from ..evidence.seal import computation_context
from ..evidence.verify import CheckReport, TaskCheck, probe_for
from ..files.artifact import (
    artifact_architecture,
    artifact_blob,
    artifact_meta,
    artifact_state,
    refuse_adopted_pt,
    torch_bytes,
)
from ..files.commit import fsync_dir
from ..files.compose import onnx_artifact
from ..files.onnx_export import read_metadata
from ..files.quantize import QUANTISATION, size_breakdown
from ..files.runtime import (
    RUN_BATCH,
    RUN_THREADS,
    Runner,
    onnx_runner,
    runtime_version,
    torch_runner,
)
from ..files.standalone import FORMAT
from ..files.store import atomic_write
from ..model.digest import bytes_digest, tensor_digest
from ..model.guard import sealed_tasks, seals_of
from ..model.network import ProgressiveNet
from ..training.data import load_for_spec
from ..training.datasets import materialize
from ..training.fit import task_logits
from ..training.validation import validation
from .transaction import read_workspace, writing

__all__ = ["export_artifact", "export_task", "check_artifact", "ExportRefused"]


class ExportRefused(ColonnadeError):
    """The artifact misses a bar (accuracy drop, tolerance); nothing was written."""

    exit_code = 1


# ----------------------------------------------------------------------------- inputs
def _output_kind(out: Path, int8: bool) -> str:
    kind = out.suffix.lower()
    if kind not in (".pt", ".onnx"):
        raise UsageError(f"{out}: the output must end in .pt (torch) or .onnx")
    if int8 and kind != ".onnx":
        raise UsageError(f"{out}: --int8 writes ONNX; name the output FILE.onnx")
    if not out.parent.is_dir():
        raise UsageError(f"{out.parent}: no such folder for the output")
    if out.is_dir():
        raise UsageError(f"{out}: is a folder; name a file")
    return kind[1:]


def _selection(net: ProgressiveNet, task: str | None, tasks: str | list[str] | None,
               all_tasks: bool) -> list[str]:
    given = sum(x is not None and x is not False for x in (task, tasks, all_tasks or None))
    if given != 1:
        raise UsageError("name what to export with exactly one of --task NAME, --tasks A,B "
                         "or --all")
    if all_tasks:  # every live task: retired ones are no longer shipped
        if not net.live_tasks:
            raise UsageError("the workspace has no live task; grow one before exporting")
        return list(net.live_tasks)
    if task is not None:
        names = [task]
    elif isinstance(tasks, str):
        names = [t.strip() for t in tasks.split(",") if t.strip()]
    else:
        names = list(tasks or [])
    if not names:
        raise UsageError("--tasks needs task names separated by commas, such as --tasks a,b")
    return names


def _calibration_file(path: Path, net: ProgressiveNet) -> np.ndarray:
    """Rows from a calibration file or folder (any data format), shaped as the input.

    Labels are not needed; if the file has them they are ignored (one class is allowed).
    """
    data = load_for_spec(path, net.spec, need_labels=False, split=False)
    return np.ascontiguousarray(materialize(data.x).numpy(), dtype=np.float32)


def _calibration(net: ProgressiveNet, names: list[str], path: str | Path | None,
                 ) -> tuple[np.ndarray, dict[str, Any]]:
    if path is not None:
        path = Path(path)
        x = _calibration_file(path, net)
        source = str(path)
    else:
        kept = [validation(net, t) for t in names]
        rows = [materialize(v[0]) for v in kept if v is not None]
        if not rows:
            raise DataError(f"--int8 needs calibration data, and the workspace keeps no "
                            f"validation data for {', '.join(names)}; pass --calibrate FILE")
        x = torch.cat(rows).numpy().astype(np.float32)
        source = "validation data kept in the workspace for " + ", ".join(
            t for t, v in zip(names, kept, strict=True) if v is not None)
    digest = tensor_digest("calibration", torch.from_numpy(x))
    return x, {"sha256": digest, "samples": int(x.shape[0]), "source": source,
               **QUANTISATION}


def _probe(folder: Path, net: ProgressiveNet, task: str,
           ) -> tuple[torch.Tensor, torch.Tensor | None, dict[str, Any]] | None:
    """The rows a task's agreement is measured on: its seal's probe (when the seal kept
    one in the workspace), else its validation."""
    entry = sealed_tasks(net).get(task)
    recorded = entry.get("probe") if entry is not None else None
    if isinstance(recorded, dict) and recorded.get("file"):
        probe, problem = probe_for(net, task, entry)
        if probe is None:
            raise WorkspaceError(f"cannot measure sealed task {task!r}: {problem}")
        return probe.x, probe.y, {"source": "seal", "version": entry.get("version"),
                                  "sha256": probe.sha256, "samples": int(probe.x.shape[0])}
    kept = validation(net, task)
    if kept is None:
        return None
    x, y = kept
    return x, y, {"source": "validation", "sha256": tensor_digest(f"{task}/x", x),
                  "samples": int(x.shape[0])}


def _probe_again(folder: Path, net: ProgressiveNet, task: str, recorded: dict[str, Any],
                 ) -> tuple[torch.Tensor | None, str | None]:
    """The rows recorded for a task at export, found again, or why they cannot be."""
    if recorded.get("source") == "seal":
        entry = next((e for e in seals_of(net, task) if e.get("version")
                      == recorded.get("version")), None)
        if entry is None:
            return None, (f"seal v{recorded.get('version')} of task {task!r}, whose probe "
                          f"the export used, is no longer in the workspace")
        probe, problem = probe_for(net, task, entry)
        if probe is None:
            return None, problem
        return probe.x, None
    kept = validation(net, task)
    if kept is None or tensor_digest(f"{task}/x", kept[0]) != recorded.get("sha256"):
        return None, (f"the validation data of task {task!r} used at export is no longer "
                      f"in the workspace as it was")
    return kept[0], None


def _ledger_int8_bytes(net: ProgressiveNet, names: list[str]) -> int:
    """The cost ledger's int8 weight bytes for what the artifact holds: 1 B for each
    parameter element (buffers, such as norm statistics, are not weights)."""
    params = {name for name, _ in net.named_parameters()}
    state = artifact_state(net, names)
    return sum(t.numel() for k, t in state.items() if k in params) * DTYPE_BYTES["int8"]


def _size_report(data: bytes, ledger: int, adopted: bytes = b"") -> dict[str, Any]:
    """The file's bytes against the ledger's (1 B a parameter), the difference by cause.

    The causes add up to the difference exactly: biases stored as int32 (3 B more each),
    scales and zero points, float tensors left unquantised (with the norms' running
    statistics, which the ledger does not count), the graph, and, with a minus sign, the
    parameters that are not int8 weights: norms folded into the layer before them, or
    kept in float (they are then counted again among the float tensors).
    """
    parts = size_breakdown(data)
    biases = parts["int32_biases"] // 4
    # An adopted ONNX model's tensors are in the file as certified, in float (compose.py).
    kept = size_breakdown(adopted)["float_tensors"] if adopted else 0
    causes = {"biases as int32 (3 B more each)": 3 * biases,
              "quantisation scales": parts["scales"],
              "zero points": parts["zero_points"],
              "the adopted ONNX model's tensors, in float as certified": kept,
              "tensors left in float": parts["float_tensors"] - kept,
              "other tensors": parts["other_tensors"],
              "graph, names and metadata": parts["graph_and_metadata"],
              "parameters not in int8 (norms folded or kept in float)":
                  parts["int8_weights"] + biases - ledger}
    why = ", ".join(f"{name} {value:+,} B" for name, value in causes.items() if value)
    return {"file_bytes": len(data), "ledger_int8_bytes": ledger,
            "difference": len(data) - ledger, "breakdown": parts, "causes": causes,
            "explained": f"the ledger counts 1 B per parameter; the file differs by {why}"}


# ----------------------------------------------------------------------------- export
def _build(net: ProgressiveNet, names: list[str], kind: str, int8: bool,
           calibration: tuple[np.ndarray, dict[str, Any]] | None,
           ) -> tuple[bytes, dict[str, Any], Runner]:
    meta = artifact_meta(net, names, "int8" if int8 else "float32",
                         calibration[1] if calibration else None)
    blob = artifact_blob(net, names, meta, program=kind == "pt")
    if kind == "pt":
        refuse_adopted_pt(blob)
        data = torch_bytes(blob)
        # The runner reads the bytes as written, the way a service will.
        return data, meta, torch_runner(torch.load(io.BytesIO(data), weights_only=True))
    data = onnx_artifact(net, blob, meta, calibration[0] if int8 else None)
    return data, meta, onnx_runner(data)


def export_artifact(folder: str | Path, out: str | Path, task: str | None = None,
                    tasks: str | list[str] | None = None, all_tasks: bool = False,
                    int8: bool = False, calibrate: str | Path | None = None,
                    accept_drop: float = DEFAULT_ACCEPT_DROP, by: str | None = None,
                    reason: str | None = None, sign: str | Path | None = None,
                    ) -> dict[str, Any]:
    """``colonnade export``: write tasks as one artifact, measured, and record it.

    ``by``, ``reason`` and ``sign`` attribute and sign the export's history entry, as for
    every writing verb (a workspace sealed with ``--require-signed`` takes no unsigned one).
    """
    folder, out = Path(folder), Path(out)
    kind = _output_kind(out, int8)
    if calibrate is not None and not int8:
        raise UsageError("--calibrate applies to --int8 only")
    if not (isinstance(accept_drop, (int, float)) and math.isfinite(accept_drop)
            and accept_drop >= 0):
        raise UsageError(f"--accept-drop takes accuracy points of at least 0, got {accept_drop}")
    staged: Path | None = None
    try:
        with writing(folder, "export", by=by, reason=reason, sign=sign) as tx:
            net = tx.net
            names = _selection(net, task, tasks, all_tasks)
            names = [t for t in net.tasks if t in names] + [t for t in names
                                                            if t not in net.task_info]
            artifact_architecture(net, names)  # unknown or retired: one sentence, now
            calibration = _calibration(net, names, calibrate) if int8 else None
            data, meta, runner = _build(net, names, kind, int8, calibration)
            rows: dict[str, dict[str, Any]] = {}
            outputs: dict[str, np.ndarray] = {}
            notes: list[str] = []
            for t in names:
                found = _probe(folder, net, t)
                if found is None:
                    notes.append(f"task {t!r} has no probe and no validation data in the "
                                 f"workspace, so no reference outputs were recorded for it")
                    continue
                x, y, probe = found
                x = materialize(x)
                with computation_context(runner.threads):
                    ws = task_logits(net, t, x, batch_size=runner.batch).numpy()
                got = runner.run(x)[t]
                rows[t] = {"probe": probe, **agreement(ws, got, None if y is None or
                                                       y.numel() == 0 else y.numpy())}
                outputs[t] = got
            why = refusals(rows, list(sealed_tasks(net)), meta["precision"], kind, accept_drop)
            if why:
                more = f" (and {len(why) - 1} more task(s))" if len(why) > 1 else ""
                raise ExportRefused(f"nothing written: {why[0]}{more}")
            adopted = meta.get("adopted") or {}
            kept = net.adopted.data if adopted.get("runtime") == "onnxruntime" else b""
            size = _size_report(data, _ledger_int8_bytes(net, names), kept) if int8 else None
            staged = out.with_name(f".{out.name}.{meta['export_id']}.tmp")
            atomic_write(staged, data)
            entry = {"step": EXPORT_STEP, "time": now(), "export_id": meta["export_id"],
                     "file": out.name, "sha256": bytes_digest(data), "bytes": len(data),
                     "format": kind, "precision": meta["precision"], "tasks": names,
                     "runtime": runner.runtime, "calibration": meta["calibration"],
                     "accept_drop": float(accept_drop) if int8 else None,
                     "tasks_report": rows, "size": size, "colonnade": __version__}
            record_export(net, entry, outputs)
        # After the commit: the record never lacks an artifact that is in place (a crash
        # between the two leaves the record naming one not yet moved there).
        os.replace(staged, out)
        staged = None
        fsync_dir(out.parent)  # the rename itself durable, as a commit's is
    finally:
        if staged is not None:
            staged.unlink(missing_ok=True)
    return {"output": str(out), "format": kind, "precision": meta["precision"],
            "bytes": len(data), "sha256": entry["sha256"], "tasks": names,
            "runtime": runner.runtime, "report": rows, "size": size, "notes": notes,
            "meta": meta}


def export_task(folder: str | Path, task: str, out: str | Path) -> dict[str, Any]:
    """One task alone (its closure only); ``export_artifact`` with ``task=``."""
    return export_artifact(folder, out, task=task)


# ----------------------------------------------------------------------------- check
def _claimed_export(data: bytes) -> str | None:
    """The export id a file says it carries, read without trusting the rest of it."""
    meta = None
    if data[:2] == b"PK":  # a torch.save zip archive
        try:
            blob = torch.load(io.BytesIO(data), weights_only=True)
            meta = blob.get("meta") if isinstance(blob, dict) else None
        except Exception:  # any damage: the file claims nothing
            meta = None
    else:
        meta = read_metadata(data)
    if isinstance(meta, dict) and meta.get("format") == FORMAT:
        return str(meta.get("export_id"))
    return None


def check_artifact(folder: str | Path, artifact: str | Path, tolerance: float | None = None,
                   ) -> CheckReport:
    """``colonnade check --artifact``: is this the file exported, and does it still compute
    what it computed at export, in the same runtime, threads and batch?"""
    if tolerance is not None and not (tolerance >= 0 and math.isfinite(tolerance)):
        raise UsageError(f"--tolerance must be a finite number of at least 0, got {tolerance}")
    folder, artifact = Path(folder), Path(artifact)
    if not artifact.is_file():
        raise UsageError(f"{artifact}: no such artifact file")
    data = artifact.read_bytes()
    net = read_workspace(folder)
    digest = bytes_digest(data)
    entry = find_export(net, sha256=digest)
    if entry is None:
        claimed = (find_export(net, export_id=_claimed_export(data) or "-")
                   or find_export(net, name=artifact.name))
        if claimed is None:
            raise UsageError(f"{artifact} is not an artifact this workspace exported: its "
                             f"SHA-256 matches no export in the history")
        return CheckReport(str(folder), [], [f"{artifact} was changed after it was exported "
                                              f"as {claimed.get('file')} at "
                                              f"{claimed.get('time')}: its SHA-256 differs "
                                              f"from the recorded one"], )
    runtime = entry.get("runtime") or {}
    notes = [f"{artifact.name} is the file exported as {entry.get('file')} at "
             f"{entry.get('time')} (SHA-256 {digest[:12]}...)"]
    here = runtime_version(str(runtime.get("name")))
    if here != runtime.get("version"):
        if tolerance is None:
            raise UsageError(f"the artifact was verified with {runtime.get('name')} "
                             f"{runtime.get('version')}, this machine has {here}; its outputs "
                             f"can only be compared within a tolerance: pass --tolerance T")
        notes.append(f"verified with {runtime.get('name')} {runtime.get('version')}, "
                     f"checked with {here}")
    threads, batch = int(runtime.get("threads", RUN_THREADS)), int(runtime.get("batch",
                                                                             RUN_BATCH))
    if entry.get("format") == "pt":
        runner = torch_runner(torch.load(io.BytesIO(data), weights_only=True), threads, batch)
    else:
        runner = onnx_runner(data, threads, batch)
    stored = net.attachments.get(ARTIFACTS_FILE, {})
    results = []
    for task, row in (entry.get("tasks_report") or {}).items():
        x, problem = _probe_again(folder, net, task, row.get("probe") or {})
        recorded = row.get("reference") or {}
        if x is None:
            results.append(TaskCheck(task, None, "unverified", failures=[problem]))
            continue
        results.append(compare_outputs(task, runner.run(materialize(x))[task],
                                       stored.get(str(recorded.get("key"))), recorded,
                                       tolerance))
    return CheckReport(str(folder), results, notes)
