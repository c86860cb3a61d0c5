"""The ``diff`` verb: what changed between two workspaces, or since an entry of one."""

from __future__ import annotations

import argparse
from typing import Any

from .output import print_json, table

__all__ = ["add_parsers"]


def _diff(args: argparse.Namespace) -> int:
    from ..app.diff import diff_workspaces
    from ..views.diff import summary_lines

    result = diff_workspaces(args.workspace, args.other, since=args.since,
                             hardware=args.hardware, check=not args.no_check)
    exit_code = 0 if result["sealed_in_a"]["all_kept"] else 1
    if args.json:
        print_json(result)
        return exit_code
    lines = summary_lines(result)
    print("\n".join(lines[:3]))
    rows = [[task, f"v{r['version_a']}", f"v{r['version_b']}" if r["version_b"] else "-",
             r["state"], r["check_b"] or "-"] for task, r in result["sealed_in_a"]["tasks"].items()]
    if rows:
        print(table(rows, ["sealed in A", "seal in A", "seal in B", "state in B", "check of B"]))
    for line in lines[3:]:
        print(line)
    for note in result.get("notes", []):
        print(f"note: {note}.")
    return exit_code


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("diff", _diff, "what changed between two workspaces (or since an entry of one): "
                            "tasks, parts, tensors, seals, spec, costs; exits 1 when a task "
                            "sealed in the first is not still sealed and exact in the second")
    p.add_argument("workspace", help="the earlier workspace (A)")
    p.add_argument("other", nargs="?", help="the later workspace (B)")
    p.add_argument("--since", metavar="ENTRY",
                   help="compare WORKSPACE now with itself after history entry ENTRY (its "
                        "number in the report's History section)")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--hardware", metavar="PROFILE",
                   help="also compare the first projected task over this device's budget")
    p.add_argument("--no-check", action="store_true",
                   help="compare by digests only, without repeating B's seal computations")
