"""The ``export`` verb: one task's closure as a standalone file that ships."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..errors import UsageError
from ..files.export import onnx_bytes, standalone_blob, torch_bytes
from ..files.store import atomic_write
from .transaction import read_workspace

__all__ = ["export_task"]


def export_task(folder: str | Path, task: str, out: str | Path) -> dict[str, Any]:
    """Write task ``task`` of a workspace to ``out`` (.pt or .onnx), atomically."""
    out = Path(out)
    kind = out.suffix.lower()
    if kind not in (".pt", ".onnx"):
        raise UsageError(f"{out}: the output must end in .pt (torch) or .onnx")
    if not out.parent.is_dir():
        raise UsageError(f"{out.parent}: no such folder for the output")
    if out.is_dir():
        raise UsageError(f"{out}: is a folder; name a file")
    net = read_workspace(folder)
    if net.adopted is not None and 0 in net.closure(task).columns:
        raise UsageError(f"task {task!r} reads the adopted model in column 0, which export "
                         f"cannot compose with the new parts yet; ship the adopted model's "
                         f"own file beside the workspace's predictions instead")
    blob = standalone_blob(net, task)
    data = torch_bytes(blob) if kind == ".pt" else onnx_bytes(blob)
    atomic_write(out, data)
    state = blob["state"]
    return {"task": task, "output": str(out), "format": kind[1:], "bytes": len(data),
            "columns": [c["index"] for c in blob["architecture"]["columns"]],
            "adapters": len(blob["architecture"]["adapters"]),
            "tensors": len(state), "parameters": sum(t.numel() for t in state.values()),
            "closure_sha256": blob["meta"]["closure_sha256"], "seal": blob["meta"]["seal"]}
