"""What changed between two workspace states: tasks, parts, tensors, seals, spec, costs.

``compare(a, b)`` takes two ``Snapshot`` objects (two workspaces, or one workspace now
and as its record says it stood earlier) and returns plain data, the same for the CLI
text, ``--json`` and the report's section. Its last answer is the one a reviewer asks
first: is every task sealed in A still sealed, with a bit-identical closure, in B?
Tensors are compared by their bytes (``digest.closure_digests`` records); where both
values are at hand and the shapes agree, the largest absolute difference is given.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..costing.ledger import cost_network
from ..model.digest import raw_bytes
from .document import Section, Table
from .snapshot import Snapshot

__all__ = ["compare", "changes_section", "summary_lines"]


def _flat(data: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(data, Mapping):
        out: dict[str, Any] = {}
        for k, v in data.items():
            out.update(_flat(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    return {prefix: data}


def _spec_changes(a: Snapshot, b: Snapshot) -> list[dict[str, Any]]:
    fa, fb = _flat(a.spec), _flat(b.spec)
    return [{"field": k, "a": fa.get(k), "b": fb.get(k)}
            for k in sorted(set(fa) | set(fb)) if fa.get(k) != fb.get(k)]


def _tensor_changes(a: Snapshot, b: Snapshot) -> dict[str, Any]:
    changed, unknown = [], 0
    keys_a, keys_b = a.keys(), b.keys()
    for key in sorted(keys_a & keys_b):
        da, db = a.digests.get(key), b.digests.get(key)
        if da is None or db is None:
            unknown += 1
            continue
        if da == db:
            continue
        row: dict[str, Any] = {"key": key, "max_abs_diff": None}
        ta = a.tensors.get(key) if a.tensors is not None else None
        tb = b.tensors.get(key) if b.tensors is not None else None
        if ta is not None and tb is not None:
            row["shape_a"], row["shape_b"] = list(ta.shape), list(tb.shape)
            if ta.shape == tb.shape and raw_bytes(ta) != raw_bytes(tb):
                diff = (ta.double() - tb.double()).abs()
                row["max_abs_diff"] = float(diff.max()) if diff.numel() else 0.0
        changed.append(row)
    only = {"only_in_a": sorted(keys_a - keys_b), "only_in_b": sorted(keys_b - keys_a)}
    return {"changed": changed, **only, "not_comparable": unknown,
            "values_known": a.tensors is not None and b.tensors is not None}


def _task_parts(arch: Mapping[str, Any], task: str) -> list[str]:
    """Tensor key prefixes of a task's own parts: its column (if it grew one) and head."""
    row = next((t for t in arch.get("tasks", []) if t["name"] == task), None)
    if row is None:
        return []
    own = [f"heads.{task}."]
    if row.get("mode") == "column":
        own.append(f"columns.{row['column']}.")
    return own


def _live(task: Mapping[str, Any] | None) -> bool:
    return task is not None and task.get("state", "live") == "live"


def _tasks(a: Snapshot, b: Snapshot, tensors: dict[str, Any]) -> dict[str, Any]:
    ta, tb = a.tasks, b.tasks
    later = b.history[len(a.history):] if b.history[:len(a.history)] == a.history else []
    stepped = {e.get("task") for e in later if isinstance(e, Mapping)
               and e.get("step") == "task_retrained"}
    changed_keys = [c["key"] for c in tensors["changed"]]
    retrained = [t for t in ta if t in tb and any(
        k.startswith(p) for p in _task_parts(b.architecture, t) for k in changed_keys)]
    reshaped = [t for t in ta if t in tb and (ta[t].get("classes"), ta[t].get("mode")) !=
                (tb[t].get("classes"), tb[t].get("mode"))]
    return {"added": [t for t in tb if t not in ta],
            "retired": [t for t in ta if _live(ta[t]) and not _live(tb.get(t))],
            "retrained": sorted((set(retrained) | set(reshaped) | stepped) & set(tb),
                                key=list(tb).index)}


def _parts(a: Snapshot, b: Snapshot) -> dict[str, Any]:
    ca = {c["index"] for c in a.architecture.get("columns", [])}
    cb = {c["index"] for c in b.architecture.get("columns", [])}
    aa, ab = a.adapters, b.adapters
    out: dict[str, list[str]] = {"columns_added": [f"column {k}" for k in sorted(cb - ca)],
                                 "columns_removed": [f"column {k}" for k in sorted(ca - cb)],
                                 "adapters_added": [], "pruned": [], "merged": [],
                                 "restored": [], "adapters_removed": []}
    for key, info in ab.items():
        before = aa.get(key)
        if before is None:
            if info.get("state") == "live":
                out["adapters_added"].append(key)
        elif before.get("state") == "live" and info.get("state") == "pruned":
            out["pruned"].append(key)
        elif before.get("state") == "live" and info.get("state") == "merged":
            out["merged"].append(key)
        elif before.get("state") != "live" and info.get("state") == "live":
            out["restored"].append(key)
    out["adapters_removed"] = [k for k in aa if k not in ab]
    return out


def _seals(a: Snapshot, b: Snapshot) -> dict[str, Any]:
    added, superseded, lifted = [], [], []
    for task, versions in b.seals.items():
        known = {s.get("version") for s in a.seals.get(task, [])}
        for s in versions:
            if s.get("version") not in known:
                added.append({"task": task, "version": s.get("version"),
                              "reason": s.get("reason")})
        was, now = a.active_seal(task), b.active_seal(task)
        # The reason: the new seal's own, else the one given when A's seal was lifted in B.
        mine = next((s for s in versions if was and s.get("version") == was.get("version")),
                    {})
        lifted_why = (mine.get("unsealed") or {}).get("reason") if isinstance(
            mine.get("unsealed"), dict) else None
        if was and now and now.get("version") != was.get("version"):
            superseded.append({"task": task, "version": was.get("version"),
                               "by": now.get("version"),
                               "reason": now.get("reason") or lifted_why})
        if was and not now:
            lifted.append({"task": task, "version": was.get("version"), "reason": lifted_why})
    for task in a.seals:
        if task not in b.seals and a.active_seal(task):
            lifted.append({"task": task, "version": a.active_seal(task).get("version"),
                           "reason": "the task is gone"})
    return {"added": added, "superseded": superseded, "lifted": lifted}


def _kept(a: Snapshot, b: Snapshot, check: Mapping[str, Any] | None) -> dict[str, Any]:
    """Per task sealed in A: is it still sealed in B with the closure A's seal recorded?"""
    verdicts = {t["task"]: t for t in (check or {}).get("tasks", [])}
    rows = {}
    for task in a.seals:
        seal = a.active_seal(task)
        if seal is None:
            continue
        now = b.active_seal(task)
        recorded = (seal.get("closure") or {}).get("tensors") or {}
        moved = sorted(k for k, d in recorded.items() if b.digests.get(k) != d)
        if now is None:
            state = "not sealed in B"
        elif moved:
            state = f"closure changed in {len(moved)} tensors"
        elif now.get("version") != seal.get("version"):
            state = f"re-sealed as v{now.get('version')}, closure bit-identical"
        else:
            state = "still sealed, closure bit-identical"
        v = verdicts.get(task)
        rows[task] = {"state": state, "version_a": seal.get("version"),
                      "version_b": (now or {}).get("version"), "moved_tensors": moved,
                      "check_b": v["verdict"] if v else None,
                      "kept": now is not None and not moved
                      and (v is None or v["verdict"] == "exact")}
    return {"tasks": rows, "all_kept": all(r["kept"] for r in rows.values())}


def _costs(a: Snapshot, b: Snapshot, hardware: Any) -> dict[str, Any] | None:
    if a.net is None or b.net is None:
        return None
    la = cost_network(a.net, project_n=10 if a.tasks else 0, hardware=hardware, latency=False)
    lb = cost_network(b.net, project_n=10 if b.tasks else 0, hardware=hardware, latency=False)
    total = {}
    for key, path in (("params", ("params",)), ("MACs", ("macs",)),
                      ("weights fp32 bytes", ("weight_bytes", "fp32")),
                      ("peak activation bytes", ("activation_bytes",))):
        va, vb = la["total"], lb["total"]
        for step in path:
            va, vb = va[step], vb[step]
        total[key] = {"a": va, "b": vb, "delta": vb - va}
    out: dict[str, Any] = {"total": total}
    if hardware is not None:
        out["first_break"] = {"a": la["hardware"]["first_break"],
                              "b": lb["hardware"]["first_break"]}
    return out


def compare(a: Snapshot, b: Snapshot, check_b: Mapping[str, Any] | None = None,
            hardware: Any = None) -> dict[str, Any]:
    """Every difference between A and B as plain data (see the module docstring)."""
    tensors = _tensor_changes(a, b)
    tasks = _tasks(a, b, tensors)
    parts = _parts(a, b)
    seals = _seals(a, b)
    spec = _spec_changes(a, b)
    n = 0
    while n < min(len(a.history), len(b.history)) and a.history[n] == b.history[n]:
        n += 1
    history = {"common": n, "only_in_a": a.history[n:], "only_in_b": b.history[n:]}
    kept = _kept(a, b, check_b)
    different = (any(tasks.values()) or any(parts.values()) or any(seals.values()) or spec
                 or tensors["changed"] or tensors["only_in_a"] or tensors["only_in_b"]
                 or history["only_in_a"] or history["only_in_b"])
    return {"a": a.label, "b": b.label, "identical": not different, "tasks": tasks,
            "parts": parts, "tensors": tensors, "seals": seals, "spec": spec,
            "costs": _costs(a, b, hardware), "history": history, "sealed_in_a": kept}


# ----------------------------------------------------------------------------- words
def _names(items: list[Any], most: int = 6) -> str:
    """Up to ``most`` names, then how many more (the JSON lists them all)."""
    if not items:
        return "none"
    shown = ", ".join(str(i) for i in items[:most])
    return shown + (f" and {len(items) - most} more" if len(items) > most else "")


def summary_lines(d: Mapping[str, Any]) -> list[str]:
    """The comparison in sentences: which is A and which B, then the verdict, then the rest."""
    lines = [f"A: {d['a']}", f"B: {d['b']}"]
    kept = d["sealed_in_a"]
    if not kept["tasks"]:
        lines.append("No task is sealed in A.")
    elif kept["all_kept"]:
        lines.append(f"Every task sealed in A ({len(kept['tasks'])}) is still sealed "
                     f"in B with a bit-identical closure.")
    else:
        bad = [f"{t} ({r['state']}" + (f", check {r['check_b']}" if r["check_b"] else "")
               + ")" for t, r in kept["tasks"].items() if not r["kept"]]
        lines.append(f"NOT every task sealed in A is still sealed and exact in "
                     f"B: {'; '.join(bad)}.")
    if d["identical"]:
        lines.append("A and B are identical: same tasks, parts, tensors, seals, "
                     "spec and history.")
        return lines
    t, p, s = d["tasks"], d["parts"], d["seals"]
    lines.append(f"Tasks added: {_names(t['added'])}; retired: {_names(t['retired'])}; "
                 f"retrained or otherwise changed: {_names(t['retrained'])}.")
    lines.append(f"Parts added: {_names(p['columns_added'] + p['adapters_added'])}; pruned: "
                 f"{_names(p['pruned'])}; merged: {_names(p['merged'])}.")
    for c in d["tensors"]["changed"]:
        diff = c.get("max_abs_diff")
        if c.get("shape_a") is not None and c.get("shape_a") != c.get("shape_b"):
            what = f"shape {c['shape_a']} -> {c['shape_b']}"
        else:
            what = f"largest difference {diff:.6g}" if diff is not None else "bytes differ"
        lines.append(f"Tensor {c['key']} differs: {what}.")
    tn = d["tensors"]
    if tn["only_in_a"] or tn["only_in_b"]:
        lines.append(f"Tensors only in A: {len(tn['only_in_a'])}; only in B: "
                     f"{len(tn['only_in_b'])}.")
    if not tn["values_known"]:
        lines.append("Old tensor values are not kept, so the earlier point is compared through "
                     "its seals' per-tensor digests (no largest difference); "
                     + (f"{tn['not_comparable']} tensors outside those seals could not be "
                        f"compared." if tn["not_comparable"] else
                        "every tensor it had is covered."))
    for x in s["added"]:
        lines.append(f"Seal added: {x['task']} v{x['version']}"
                     + (f" ({x['reason']})" if x.get("reason") else "") + ".")
    for x in s["superseded"]:
        lines.append(f"Seal superseded: {x['task']} v{x['version']} by v{x['by']}, reason: "
                     f"{x.get('reason') or 'not recorded'}.")
    for x in s["lifted"]:
        lines.append(f"Seal lifted: {x['task']} v{x['version']}, reason: "
                     f"{x.get('reason') or 'not recorded'}.")
    for c in d["spec"]:
        lines.append(f"Spec {c['field']}: {c['a']!r} -> {c['b']!r}.")
    if d.get("costs"):
        parts = [f"{k} {v['a']:,} -> {v['b']:,} ({v['delta']:+,})"
                 for k, v in d["costs"]["total"].items() if v["delta"]]
        if parts:
            lines.append("Costs: " + "; ".join(parts) + ".")
        brk = d["costs"].get("first_break")
        if brk and brk["a"] != brk["b"]:
            lines.append(f"First projected task over the device budget: {brk['a'] or 'none'} "
                         f"-> {brk['b'] or 'none'}.")
    h = d["history"]
    if h["only_in_b"] or h["only_in_a"]:
        lines.append(f"History: {len(h['only_in_b'])} entries only in B, "
                     f"{len(h['only_in_a'])} only in A (after {h['common']} in common).")
    return lines


def changes_section(d: Mapping[str, Any]) -> Section:
    """The comparison as a report section."""
    rows = [["task sealed in " + str(d["a"]), "seal in A", "seal in B", "state in B",
             "check of B"]]
    for task, r in d["sealed_in_a"]["tasks"].items():
        rows.append([task, f"v{r['version_a']}", f"v{r['version_b']}" if r["version_b"]
                     else "-", r["state"], r["check_b"] or "-"])
    return Section(f"What changed since {d['a']}", paragraphs=summary_lines(d),
                   tables=[Table(rows)] if len(rows) > 1 else [], anchor="changes")
