"""Evidence about shipped artifacts: agreement with the workspace, the export record, checks.

An export is recorded in the workspace's history with the file's SHA-256 and, for every
task it holds, the artifact's own outputs on that task's probe (kept in the workspace
file ``artifacts.safetensors``) together with how they were computed (runtime, version,
thread count, batch size). ``check --artifact`` finds the record by the file's digest,
repeats that computation, and compares, as seals do (DESIGN.md, invariant 8): ``exact``
when every output is bit-identical, ``within T`` with a tolerance, ``moved`` otherwise.

Nothing here runs a runtime or reads a file: the application layer passes outputs in.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import torch

from ..model.digest import raw_bytes, tensor_digest
from ..model.network import ProgressiveNet
from .verify import TaskCheck

__all__ = ["ARTIFACTS_FILE", "DEFAULT_ACCEPT_DROP", "ONNX_TOLERANCE", "EXPORT_STEP",
           "agreement", "refusals", "record_export", "find_export", "compare_outputs",
           "reference_key"]

ARTIFACTS_FILE = "artifacts.safetensors"
EXPORT_STEP = "artifact_exported"
# Accuracy points a sealed task may lose in an int8 artifact unless --accept-drop says
# more (the default; a common practice figure for post-training quantisation).
DEFAULT_ACCEPT_DROP = 1.0
# Largest logit difference accepted between a float ONNX artifact in onnxruntime and the
# workspace in torch: another runtime sums in another order. Measured here: at most
# 4e-7 over every layer kind and adapter kind of the test networks; 1e-4 leaves room for
# wide layers (a 784 -> 512 dense layer alone differed by 9.5e-7 between batchings).
ONNX_TOLERANCE = 1e-4


def reference_key(export_id: str, task: str) -> str:
    return f"{export_id}/{task}"


def _accuracy(logits: np.ndarray, y: np.ndarray | None) -> float | None:
    if y is None or y.size == 0:
        return None
    return float((logits.argmax(1) == y).mean())


def agreement(workspace: np.ndarray, artifact: np.ndarray, y: np.ndarray | None,
              ) -> dict[str, Any]:
    """A task's float workspace logits against the artifact's, on the same rows."""
    diff = np.abs(workspace.astype(np.float64) - artifact.astype(np.float64))
    biggest = float(diff.max()) if diff.size else 0.0
    return {"samples": int(workspace.shape[0]),
            "workspace_accuracy": _accuracy(workspace, y),
            "artifact_accuracy": _accuracy(artifact, y),
            "agreement": float((workspace.argmax(1) == artifact.argmax(1)).mean())
            if workspace.shape[0] else None,
            "max_abs_diff": biggest if math.isfinite(biggest) else math.inf,
            "bit_identical": workspace.dtype == artifact.dtype
            and workspace.shape == artifact.shape
            and workspace.tobytes() == artifact.tobytes()}


def refusals(rows: Mapping[str, Mapping[str, Any]], sealed: list[str], precision: str,
             kind: str, accept_drop: float) -> list[str]:
    """Why the artifact must not be written: one sentence per task that fails its bar.

    int8: a sealed task that loses more than ``accept_drop`` accuracy points. Float
    ONNX: any task beyond ONNX_TOLERANCE. torch .pt: any task not bit-identical.
    """
    out = []
    for task, row in rows.items():
        if precision == "int8":
            before, after = row["workspace_accuracy"], row["artifact_accuracy"]
            if task in sealed and before is not None and after is not None:
                drop = 100.0 * (before - after)
                if drop > accept_drop:
                    out.append(f"sealed task {task!r} loses {drop:.2f} accuracy points in "
                               f"int8 ({100 * before:.2f} % -> {100 * after:.2f} % on its "
                               f"probe), more than the {accept_drop:g} accepted; calibrate "
                               f"on more representative data (--calibrate) or pass "
                               f"--accept-drop POINTS")
        elif kind == "pt" and not row["bit_identical"]:
            out.append(f"task {task!r} in the .pt artifact is not bit-identical to the "
                       f"workspace (up to {row['max_abs_diff']:.3g}); report this as a bug")
        elif kind == "onnx" and row["max_abs_diff"] > ONNX_TOLERANCE:
            out.append(f"task {task!r} in onnxruntime differs from the workspace by up to "
                       f"{row['max_abs_diff']:.3g}, beyond the tolerance {ONNX_TOLERANCE:g}; "
                       f"export to .pt instead")
    return out


def record_export(net: ProgressiveNet, entry: dict[str, Any],
                  outputs: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """Append the export to the history and keep the artifact's probe outputs.

    ``entry`` holds the file, its digest, tasks, precision, runtime and per-task figures;
    each task's reference gets a key and digest here.
    """
    store = net.attachments.setdefault(ARTIFACTS_FILE, {})
    for task, values in outputs.items():
        key = reference_key(entry["export_id"], task)
        tensor = torch.from_numpy(np.ascontiguousarray(values)).clone()
        store[key] = tensor
        entry["tasks_report"][task]["reference"] = {
            "file": ARTIFACTS_FILE, "key": key, "sha256": tensor_digest(key, tensor),
            "shape": list(tensor.shape), "dtype": str(tensor.dtype).removeprefix("torch.")}
    net.meta.setdefault("history", []).append(entry)
    return entry


def find_export(net: ProgressiveNet, sha256: str | None = None, export_id: str | None = None,
                name: str | None = None) -> dict[str, Any] | None:
    """The newest export record matching a digest (or else an export id, or a file name)."""
    for entry in reversed(net.meta.get("history") or []):
        if not isinstance(entry, dict) or entry.get("step") != EXPORT_STEP:
            continue
        if sha256 is not None and entry.get("sha256") == sha256:
            return entry
        if export_id is not None and entry.get("export_id") == export_id:
            return entry
        if name is not None and entry.get("file") == name:
            return entry
    return None


def compare_outputs(task: str, got: np.ndarray, reference: torch.Tensor | None,
                    recorded: Mapping[str, Any], tolerance: float | None) -> TaskCheck:
    """One task's artifact outputs now against the reference recorded at export."""
    result = TaskCheck(task, None, "exact", samples=int(got.shape[0]))
    if reference is None:
        result.verdict = "unverified"
        result.failures.append(f"the reference outputs of task {task!r} are missing from "
                               f"{recorded.get('file', ARTIFACTS_FILE)}; restore the "
                               f"workspace from a backup")
        return result
    if tensor_digest(str(recorded.get("key")), reference) != recorded.get("sha256"):
        result.verdict = "unverified"
        result.failures.append(f"the stored reference outputs of task {task!r} changed "
                               f"since the export")
        return result
    now = torch.from_numpy(np.ascontiguousarray(got))
    if now.shape != reference.shape:
        result.verdict = "moved"
        result.failures.append(f"task {task!r}: outputs of shape {list(now.shape)}, the "
                               f"reference {list(reference.shape)}")
        return result
    exact = now.dtype == reference.dtype and raw_bytes(now) == raw_bytes(reference)
    diff = (now.double() - reference.double()).abs()
    biggest = float(diff.max()) if diff.numel() else 0.0
    if math.isnan(biggest):
        biggest = math.inf
    same = now.argmax(1) == reference.argmax(1)
    result.max_abs_diff = 0.0 if exact else biggest
    result.predictions_agree = bool(same.all())
    if exact:
        return result
    agree = f"predicted classes agree on {int(same.sum())} of {same.numel()} samples"
    if tolerance is None:
        result.verdict = "moved"
        result.failures.append(f"task {task!r}: the artifact's outputs are not bit-identical "
                               f"to those recorded at export: they differ by up to "
                               f"{biggest:.3g}; {agree}")
    elif biggest > tolerance or not result.predictions_agree:
        result.verdict = "moved"
        result.failures.append(f"task {task!r}: the artifact's outputs differ from those "
                               f"recorded at export by up to {biggest:.3g}, beyond the "
                               f"tolerance {tolerance:g} or with classes changed; {agree}")
    else:
        result.verdict = f"within {tolerance:g}"
    return result
