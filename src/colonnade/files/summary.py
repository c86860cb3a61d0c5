"""The network's sizes, written into the manifest at every save.

``show`` prints tasks, closures and parameter counts from the manifest alone, without
importing torch (so it starts fast); these figures are what it needs beyond the record.
They are derived data, recomputed from the live modules (``numel``, through the cost
ledger) at every save, so they are never edited on their own.
"""

from __future__ import annotations

from typing import Any

from ..costing.costs import count_params, task_cost
from ..model.network import ProgressiveNet

__all__ = ["network_summary"]


def network_summary(net: ProgressiveNet) -> dict[str, Any]:
    """Per task its closure columns and parameters on its path; per part its parameters."""
    tasks = {}
    for name in net.task_info:
        tasks[name] = {"closure_columns": list(net.closure(name).columns),
                       "params_path": task_cost(net, name).path.params.total}
    columns = {str(c.index): count_params(net.columns[c.index], "column").total
               for c in net.column_info}
    adapters = {key: sum(p.numel() for p in net.adapters[key].parameters())
                if key in net.adapters else 0 for key in net.adapter_info}
    column_total = sum(count_params(c, "column").total for c in net.columns)
    adapter_total = sum(count_params(a, "adapters").total for a in net.adapters.values())
    head_total = sum(count_params(h, "head").total for h in net.heads.values())
    return {"tasks": tasks, "columns": columns, "adapters": adapters,
            "parameters": {"columns": column_total, "adapters": adapter_total,
                           "heads": head_total,
                           "total": column_total + adapter_total + head_total}}
