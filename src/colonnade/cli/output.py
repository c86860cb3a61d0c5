"""Plain-text tables and JSON for terminal output; formatting only."""

from __future__ import annotations

import json
from typing import Any

__all__ = ["table", "print_json", "metric"]


def table(rows: list[list[Any]], headers: list[str]) -> str:
    """A plain text table, right-aligned numbers, for terminal output."""
    def cell(v: Any) -> str:
        if v is None:
            return "-"
        if isinstance(v, float):
            return f"{v:.4f}" if abs(v) < 1000 else f"{v:,.0f}"
        if isinstance(v, int) and not isinstance(v, bool):
            return f"{v:,}"
        return str(v)

    text = [[cell(v) for v in row] for row in rows]
    widths = [max(len(h), *(len(r[i]) for r in text)) if text else len(h)
              for i, h in enumerate(headers)]
    numeric = [all(isinstance(r[i], (int, float)) or r[i] is None for r in rows) and rows
               for i in range(len(headers))]
    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if numeric[i] else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths, strict=True))).rstrip()
    out = [line(headers), line(["-" * w for w in widths])]
    out += [line(r) for r in text]
    return "\n".join(out)


def print_json(data: Any) -> None:
    print(json.dumps(data, indent=2, default=str))


def metric(value: float | None) -> str:
    return "-" if value is None else f"{value:+.4f}"
