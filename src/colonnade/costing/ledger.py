"""The growth ledger of a workspace: costs, projection and verdicts as plain data.

This is what ``colonnade cost`` prints (and ``--json`` dumps) and what the report is
built from: ``cost_network`` gathers, for a network in memory, the
shape-derived costs (``costs``), measured latency (``latency``), the projection and the
verdicts against a hardware profile (``sizing``) into JSON-ready dictionaries.
"""

from __future__ import annotations

from dataclasses import asdict
from typing import Any

from ..errors import UsageError
from ..model.network import ProgressiveNet
from .costs import (
    ACTIVATION_RULE,
    DTYPE_BYTES,
    MAC_CONVENTION,
    NetworkCost,
    ParamCount,
    PathCost,
    ledger_of,
    weight_bytes,
)
from .hardware import HardwareProfile
from .latency import ALL_TASKS, SPREAD_LIMIT, Latency, measure_latencies
from .sizing import Projection, project
from .verdicts import Need, Verdict, first_break, price_options, verdicts

__all__ = ["cost_network", "CONVENTIONS"]

CONVENTIONS = {
    "macs": MAC_CONVENTION,
    "flops": "FLOPs = 2 x MACs",
    "weight_bytes": "parameter elements x element size: fp32 4 B (IEEE 754 binary32), fp16 "
                    "2 B (binary16), bf16 2 B, int8 1 B (quantisation scales not counted); "
                    "tasks: the parameters on the task's path; total: the whole network",
    "activation_bytes": ACTIVATION_RULE + "; given at fp32 (4 B per element)",
    "params_added": "the parameters the task brought: its column or head and the adapters "
                    "into them",
    "params_path": "the parameters its inference uses: its closure",
    "buffers": "buffer elements (norm running statistics and counters), not parameters",
    "latency_ms": "measured on this machine with a fixed thread count (--threads, default "
                  "1): median, quartiles and extremes of repeated calls after warm-up, at "
                  "batch 1 and 64, every task timed in turn so that load from elsewhere "
                  "hits all alike; a figure whose interquartile range exceeds "
                  f"{SPREAD_LIMIT:g} x its median is marked untrustworthy (trusted: false)",
}


def _latency(lat: dict[int, Latency] | None) -> dict[str, Any]:
    if lat is None:
        return {"batch_1": None, "batch_64": None}
    return {f"batch_{b}": v.to_dict() for b, v in lat.items()}


def _params(p: ParamCount) -> dict[str, int]:
    return {"column": p.column, "adapters": p.adapters, "head": p.head, "frozen": p.frozen,
            "trainable": p.trainable}


def _path(path: PathCost) -> dict[str, Any]:
    return {"macs": path.macs, "flops": path.flops, "macs_by_part": dict(path.macs_by_part),
            "weight_bytes": path.weight_bytes,
            "activation_bytes": path.activation_bytes["fp32"],
            "activation_peak_at": path.activation_peak_at,
            "buffers": {"elements": path.params.buffers, "bytes": path.params.buffer_bytes}}


def _need(need: Need | None) -> dict[str, Any] | None:
    return None if need is None else asdict(need)


def _over(v: Verdict, profile: HardwareProfile) -> dict[str, dict[str, float]]:
    """Each budget exceeded: the need, the budget and their ratio (bytes or ms)."""
    need = {"weight_memory": v.need.weight_bytes, "activation_memory": v.need.activation_bytes,
            "latency": v.need.latency_ms}
    limits = profile.budgets()
    return {k: {"need": need[k], "budget": limits[k], "ratio": r} for k, r in v.over.items()}


def _projection(proj: Projection) -> dict[str, Any]:
    rule = proj.rule
    return {
        "rule": {"mode": rule.mode, "width": rule.width, "classes": rule.classes,
                 "lateral": rule.lateral, "base": asdict(rule.base),
                 "per_earlier_column": asdict(rule.per_earlier_column), "text": rule.text()},
        "tasks": [{"task": p.task, "index": p.index, "mode": p.mode, "column": p.column,
                   "width": p.width, "params_added": p.added.params,
                   "params_added_by_part": dict(p.added_by_part),
                   "params_path": p.path.params, "macs": p.path.macs,
                   "macs_by_part": dict(p.path_macs_by_part),
                   "flops": 2 * p.path.macs, "weight_bytes": weight_bytes(p.path.params),
                   "activation_bytes": p.activation_elements * DTYPE_BYTES["fp32"],
                   "network_params": p.network.params,
                   "network_weight_bytes": weight_bytes(p.network.params),
                   "network_float_buffers": p.network.float_buffers,
                   "network_macs_all": p.network_macs_all}
                  for p in proj.tasks],
    }


def cost_network(net: ProgressiveNet, project_n: int = 0, width: float | None = None,
                 hardware: HardwareProfile | None = None, classes: int | None = None,
                 latency: bool = True, repeats: int = 20, threads: int = 1) -> dict[str, Any]:
    """The ledger of a network in memory; see ``colonnade.app.views.cost_workspace``."""
    if width is not None and not project_n:
        raise UsageError("--width is a what-if for future tasks; use it with --project N")
    if classes is not None and not project_n:
        raise UsageError("--classes sets the class count of future tasks; use it with "
                         "--project N")
    if not isinstance(repeats, int) or repeats < 1:
        raise UsageError(f"--repeats takes a positive number, got {repeats}")
    base: NetworkCost = ledger_of(net)
    proj = project(net, project_n, width=width, classes=classes, base=base) if project_n \
        else None
    measured = measure_latencies(net, [t.task for t in base.tasks], repeats, threads=threads) \
        if latency and base.tasks else {}
    tasks = []
    for t in base.tasks:
        row = {"task": t.task, "mode": t.mode, "column": t.column,
               "params_added": t.added.total, "params_path": t.path.params.total,
               "params": _params(t.path.params), "params_added_by_part": _params(t.added)}
        row.update(_path(t.path))
        row["latency_ms"] = _latency(measured.get(t.task))
        tasks.append(row)
    total: dict[str, Any] = {"tasks": len(net.live_tasks), "columns": len(net.columns),
                             "params": base.total.params.total,
                             "params_by_part": _params(base.total.params)}
    total.update(_path(base.total))
    total["macs_separate"] = base.separate_macs
    total["latency_ms"] = _latency(measured.get(ALL_TASKS))
    out: dict[str, Any] = {"spec": net.spec.name, "input": list(net.input_shape),
                           "latency_threads": threads if latency else None,
                           "lateral": net.spec.lateral.kind, "conventions": dict(CONVENTIONS),
                           "tasks": tasks, "total": total}
    if proj is not None:
        out["projection"] = _projection(proj)
    if hardware is not None:
        rows = verdicts(base, proj, hardware)
        brk = first_break([v for v in rows if v.future])
        already = first_break([v for v in rows if not v.future])
        options = price_options(net, base, project_n, hardware, width=width, classes=classes) \
            if (project_n and (brk or already)) else []
        out["hardware"] = {
            "profile": hardware.to_dict(),
            "rule": "weights: every parameter and floating buffer of the network grown "
                    "through the task, at the profile's dtype; activations: the task's own "
                    "batch-1 peak at that dtype; latency: the task's path MACs over the "
                    "sustained MAC rate (a lower bound)",
            "verdicts": [{"task": v.task, "future": v.future, "fits": v.fits,
                          "need": asdict(v.need), "over": _over(v, hardware)} for v in rows],
            "first_break": brk.task if brk else None,
            "already_exceeded": already.task if already else None,
            "options": [{"name": o.name, "what": o.what, "status": o.status,
                         "first_break": o.first_break, "last": _need(o.last), "note": o.note}
                        for o in options],
        }
    return out
