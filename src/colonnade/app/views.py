"""Workspace verbs that read and render: ``cost``, ``report`` and ``draw``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..costing.hardware import load_profile
from ..costing.ledger import cost_network
from ..errors import ColonnadeError, UsageError
from ..files.store import atomic_write
from ..model.network import ProgressiveNet
from ..views.diff import changes_section
from ..views.draw import INSTALL_HINT, GraphvizMissingError, auto_compact, format_of, to_dot
from ..views.report import DEFAULT_PROJECT, build_report
from .diff import fresh_check, since_diff
from .record import verify_record
from .transaction import read_workspace

__all__ = ["cost_workspace", "write_report", "draw_workspace", "render"]


def write_report(folder: str | Path, out: str | Path, hardware: str | Path | None = None,
                 project_n: int = DEFAULT_PROJECT, latency: bool = True, repeats: int = 20,
                 since: str | int | None = None, pdf: bool = True, check: bool = True,
                 threads: int = 1, trust: list[str | Path] | None = None) -> dict[str, Any]:
    """``colonnade report``: build the report of a workspace and write it into ``out``.

    The report opens with a fresh ``check`` of every sealed task (``check=False`` skips
    it and says so); ``since`` (a history entry number) adds what changed since then.
    The record (its chain, files and signatures, against ``trust`` when given) is verified
    for the summary and the history. Every file is made in memory first, the PDF included,
    then each is written atomically.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise UsageError(f"{out}: exists and is not a folder; give a folder for the report")
    profile = load_profile(hardware) if hardware is not None else None
    folder = Path(folder)
    net = read_workspace(folder)
    checked = fresh_check(folder, net) if check else None
    record = verify_record(folder, trust).to_dict()
    changes = changes_data = None
    if since is not None:
        changes_data = since_diff(folder, net, since, checked, profile)
        changes = changes_section(changes_data)
    files = build_report(net, folder.resolve().name or str(folder), profile, project_n,
                         latency, repeats, check=checked, record=record, changes=changes,
                         changes_data=changes_data, pdf=pdf, threads=threads)
    out.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        atomic_write(out / name, data)
    return {"output": str(out), "files": sorted(files)}


def draw_workspace(folder: str | Path, output: str | Path, task: str | None = None,
                   compact: bool | None = None, direction: str = "BT", show_removed: bool = False,
                   ) -> dict[str, Any]:
    """``colonnade draw``: load a workspace and render its diagram."""
    net = read_workspace(folder)
    return render(net, output, task=task, compact=compact, direction=direction,
                  show_removed=show_removed)


def cost_workspace(folder: str | Path, project_n: int = 0, width: float | None = None,
                   hardware: str | Path | None = None, classes: int | None = None,
                   latency: bool = True, repeats: int = 20, threads: int = 1,
                   ) -> dict[str, Any]:
    """What each task of a workspace costs now, what N more will cost, and the verdicts.

    Costs are read from the live modules of each task's closure; latency is measured on
    this machine unless ``latency=False``; ``hardware`` is a profile path or name.
    """
    profile = load_profile(hardware) if hardware is not None else None
    net = read_workspace(folder)
    out = cost_network(net, project_n, width, profile, classes, latency, repeats, threads)
    out["workspace"] = str(folder)
    return out


def render(net: ProgressiveNet, output: str | Path, task: str | None = None,
           compact: bool | None = None, direction: str = "BT", show_removed: bool = False,
           ) -> dict[str, Any]:
    """Write the diagram to ``output`` (format from its suffix), atomically.

    Without graphviz's ``dot`` program, the DOT source is written beside ``output`` (same
    name, ``.dot``) and GraphvizMissingError says how to install graphviz. ``compact=None``
    chooses the compact view from ``AUTO_COMPACT_TASKS`` tasks on.
    """
    import graphviz

    output = Path(output)
    if output.is_dir():
        raise UsageError(f"{output}: is a folder; give a file name such as "
                         f"{output / 'architecture.svg'}")
    fmt = format_of(output)
    if not output.parent.is_dir():
        raise UsageError(f"{output.parent}: no such folder for the diagram; create it first")
    if task is not None:
        net.task(task)
    compact = auto_compact(net, compact)
    dot = to_dot(net, task=task, compact=compact, direction=direction,
                 show_removed=show_removed, dpi=144 if fmt == "png" else None)
    result = {"output": str(output), "format": fmt, "compact": compact, "task": task}
    if fmt == "dot":
        atomic_write(output, dot.source)
        return result
    try:
        data = dot.pipe(format=fmt, engine="dot", quiet=True)
    except graphviz.ExecutableNotFound:
        beside = output.with_suffix(".dot")
        atomic_write(beside, dot.source)
        raise GraphvizMissingError(
            f"graphviz's dot program was not found, so only the DOT source was written to "
            f"{beside}; {INSTALL_HINT} to get {output.name}") from None
    except graphviz.CalledProcessError as exc:
        detail = (exc.stderr or b"").decode("utf-8", "replace").strip().splitlines()
        raise ColonnadeError(f"graphviz's dot failed on the diagram "
                             f"({detail[0] if detail else exc}); please report this") from None
    atomic_write(output, data)
    return result
