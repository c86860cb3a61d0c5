"""``colonnade diff``: what changed between two workspaces, or since an entry of one.

Both sides are read, never written. A workspace whose files were changed outside
colonnade is still read (``strict=False``) so that the diff can name the tensor that
moved; the mismatch is reported with the rest. The later side (B) is checked afresh, so
the answer to "is every task sealed in A still sealed and exact in B" rests on a repeat
of each seal's computation, not only on digests.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..costing.hardware import load_profile
from ..errors import UsageError
from ..model.guard import sealed_tasks
from ..model.network import ProgressiveNet
from ..views.diff import compare
from ..views.snapshot import entry_index, snapshot_at, snapshot_of
from .evidence import check_workspace
from .transaction import read_workspace

__all__ = ["diff_workspaces", "fresh_check", "since_diff"]


def fresh_check(folder: Path, net: ProgressiveNet) -> dict[str, Any] | None:
    """``check`` of every sealed task of ``folder`` as plain data; None when none is sealed."""
    if not sealed_tasks(net):
        return None
    return check_workspace(folder).to_dict()


def since_diff(folder: Path, net: ProgressiveNet, since: str | int,
               checked: dict[str, Any] | None, profile: Any = None) -> dict[str, Any]:
    """The workspace now against itself after history entry ``since``."""
    history = list(net.meta.get("history") or [])
    n = entry_index(history, str(since))
    earlier = snapshot_at(net, n, f"{folder} at entry {n}")
    result = compare(earlier, snapshot_of(net, f"{folder} now"), checked, profile)
    result["since"] = n
    return result


def _mismatch_notes(label: str, net: ProgressiveNet) -> list[str]:
    return [f"{label}: {name} no longer matches the SHA-256 in its manifest, so it was "
            f"changed outside colonnade" for name in net.meta.get("_mismatched", [])]


def diff_workspaces(a: str | Path, b: str | Path | None = None, since: str | int | None = None,
                    hardware: str | Path | None = None, check: bool = True,
                    ) -> dict[str, Any]:
    """``colonnade diff``: compare workspace ``a`` with ``b``, or with itself at ``since``."""
    if (b is None) == (since is None):
        raise UsageError("give a second workspace to compare with, or --since ENTRY to "
                         "compare one workspace with an earlier point of its history "
                         "(not both)")
    profile = load_profile(hardware) if hardware is not None else None
    a = Path(a)
    net_a = read_workspace(a, strict=False)
    if since is not None:
        checked = fresh_check(a, net_a) if check else None
        result = since_diff(a, net_a, since, checked, profile)
        result["notes"] = _mismatch_notes(str(a), net_a)
        return result
    b = Path(b)
    net_b = read_workspace(b, strict=False)
    checked = fresh_check(b, net_b) if check else None
    result = compare(snapshot_of(net_a, str(a)), snapshot_of(net_b, str(b)), checked, profile)
    result["notes"] = _mismatch_notes(str(a), net_a) + _mismatch_notes(str(b), net_b)
    if result["notes"]:
        result["identical"] = False
    return result
