"""The ``show`` verb: what a workspace holds, read from its manifest alone.

``show`` needs only the record and the sizes that every save writes into the manifest
(``files.summary``), so it reads YAML and never imports torch: it starts in a fraction of
the time a verb that loads the weights does (``make bench`` measures it). A workspace
saved before the summary existed is loaded whole once, the slow way.
"""

from __future__ import annotations

import importlib
from pathlib import Path
from typing import Any

from ..errors import WorkspaceError
from ..evidence.record import verify_chain
from ..evidence.transfer import record_of
from ..files.manifest import MANIFEST, read_manifest
from ..model.seal_index import active_seals

__all__ = ["describe"]


def _target(adapter: dict[str, Any]) -> str:
    if adapter.get("head") is not None:
        return f"head {adapter['head']}"
    return f"column {adapter.get('column')} block {adapter.get('block')}"


def _summary(folder: str | Path, manifest: dict[str, Any]) -> dict[str, Any]:
    summary = manifest.get("summary")
    if isinstance(summary, dict):
        return summary
    # An older workspace: compute the sizes from the loaded network (imports torch).
    store = importlib.import_module("colonnade.files.store")
    summary_module = importlib.import_module("colonnade.files.summary")
    return summary_module.network_summary(store.load(folder))


def _input_shape(raw: Any) -> list[int]:
    """The sample shape from the spec's ``input``: a list, or ``{shape: [...], ...}``."""
    return list((raw.get("shape") if isinstance(raw, dict) else raw) or [])


def _normalization(raw: Any, history: list[dict[str, Any]]) -> dict[str, Any] | None:
    """The input normalisation: from the spec, or as fitted on the first task (history)."""
    norm = raw.get("normalize") if isinstance(raw, dict) else None
    if isinstance(norm, dict):
        return {"mean": norm.get("mean"), "std": norm.get("std"), "from": "spec"}
    if norm == "fit":
        for entry in history:
            fitted = entry.get("input_normalization")
            if isinstance(fitted, dict):
                return {"mean": fitted.get("mean"), "std": fitted.get("std"),
                        "from": f"fitted on task {entry.get('task')!r}"}
        return {"mean": None, "std": None, "from": "fit on the first task (none yet)"}
    return None


def describe(folder: str | Path) -> dict[str, Any]:
    """What ``show`` prints: tasks, columns, heads, adapters and parameter counts."""
    manifest = read_manifest(folder)
    findings = verify_chain(manifest)
    if findings:  # never print a forged figure as if it were the record
        raise WorkspaceError(f"{folder}: the record does not verify: {findings[0].message}; "
                             f"run 'colonnade check {folder}' and restore the workspace from a "
                             f"copy you trust")
    try:
        return _describe(folder, manifest, _summary(folder, manifest))
    except (KeyError, TypeError, AttributeError, ValueError):
        raise WorkspaceError(f"{Path(folder) / MANIFEST}: its network section or summary is "
                             f"malformed; run 'colonnade check {folder}' or restore it from a "
                             f"backup") from None


def _describe(folder: str | Path, manifest: dict[str, Any], summary: dict[str, Any],
              ) -> dict[str, Any]:
    spec = manifest.get("spec") or {}
    network = manifest.get("network") or {}
    task_rows = network.get("tasks") or []
    names = [str(t["name"]) for t in task_rows]
    seals = active_seals(manifest.get("seals") or {}, names)
    records = manifest.get("records") or {}
    tasks = []
    for t in task_rows:
        name = str(t["name"])
        sizes = summary["tasks"][name]
        tasks.append({
            "task": name, "mode": t["mode"], "column": t["column"], "classes": t["classes"],
            "state": t.get("state", "live"),
            "val_accuracy": (records.get(name) or {}).get("val_accuracy"),
            "closure_columns": list(sizes["closure_columns"]),
            "params_path": sizes["params_path"],
            "seal": seals[name]["version"] if name in seals else None,
            "class_names": t.get("class_names"),
        })
    columns = [{"column": c["index"], "task": c["task"], "width": float(c["width"]),
                "params": summary["columns"][str(c["index"])]}
               for c in network.get("columns") or []]
    adapters = [{"key": a["key"], "kind": a["kind"], "source": a["source"],
                 "target": _target(a), "state": a.get("state", "live"),
                 "params": summary["adapters"].get(a["key"], 0)}
                for a in network.get("adapters") or []]
    history = manifest.get("history") or []
    lateral = spec.get("lateral") or {}
    return {
        "workspace": str(folder),
        "spec": spec.get("name", "network"),
        "input": _input_shape(spec.get("input")),
        "normalization": _normalization(spec.get("input"), history),
        "lateral": lateral.get("kind", "nonlinear"),
        "tasks": tasks,
        "columns": columns,
        "adapters": adapters,
        "parameters": summary["parameters"],
        "seals": {t: {"version": e.get("version"), "time": e.get("time"),
                      "closure_sha256": (e.get("closure") or {}).get("sha256"),
                      "probe_accuracy": (e.get("metrics") or {}).get("accuracy")}
                  for t, e in seals.items()},
        "transfer": record_of(history, names, seals),
        "history": history,
    }
