"""A report for a reviewer: ``report.md``, a self-contained ``report.html``, ``report.json``.

The report is the cost ledger (``ledger.cost_network``) with its projection and, given a
hardware profile, the verdicts and priced options; plus, when the workspace holds them,
the accuracy matrix of the continual-learning record (``transfer.record``) and the
architecture diagram (``draw.to_dot``, which needs graphviz's ``dot``). Parts that are
missing are skipped and said so. The HTML inlines every image as base64, has no script
and no external link, so it opens from disk with no network. Everything is computed in
memory first, then each file is written atomically.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

from .._version import __version__
from ..clock import now
from ..costing.hardware import format_bytes, format_rate, verdict_text
from ..costing.latency import SPREAD_LIMIT
from ..costing.ledger import cost_network
from ..evidence.transfer import record
from ..model.guard import sealed_tasks
from ..model.network import ProgressiveNet
from .document import Figure, Section, Table, to_html, to_markdown
from .draw import to_dot
from .evidence_sections import evidence_data, seal_sections, summary_section, timeline_section
from .pdf import html_to_pdf
from .plots import accuracy_heatmap, macs_per_task, params_per_task, projected_growth

__all__ = ["build_report", "accuracy_record", "diagram_svg", "REPORT_FILES"]

REPORT_FILES = ("report.md", "report.html", "report.json", "report.pdf")
DEFAULT_PROJECT = 10


# ----------------------------------------------------------------------------- optional parts
def accuracy_record(net: ProgressiveNet) -> dict[str, Any] | None:
    """The accuracy matrix and transfer metrics, when the workspace has them."""
    try:
        rec = record(net, list(sealed_tasks(net)))
    except Exception:  # an optional part: a record we cannot read is skipped, not fatal
        return None
    R = rec.get("R") if isinstance(rec, dict) else None
    if not R or not any(v is not None for row in R for v in row):
        return None
    return rec


def diagram_svg(net: ProgressiveNet, fmt: str = "svg") -> tuple[bytes | None, str]:
    """The architecture diagram (SVG, or PNG at 144 dpi), or None and why it is missing."""
    if not net.columns:
        return None, "the network has no column yet"
    try:
        import graphviz
    except ImportError:
        return None, "the graphviz Python package is not installed (pip install graphviz)"
    try:
        dot = to_dot(net, dpi=144 if fmt == "png" else None)  # compact from 8 tasks on
        return dot.pipe(format=fmt, engine="dot", quiet=True), ""
    except graphviz.ExecutableNotFound:
        return None, ("graphviz's dot program is not installed (Debian: sudo apt-get install "
                      "graphviz)")
    except Exception as exc:  # an optional part: say why it is missing, keep the report
        return None, f"the diagram could not be drawn ({exc.__class__.__name__}: {exc})"


# ----------------------------------------------------------------------------- series
def _growth_series(ledger: dict[str, Any]) -> dict[str, Any]:
    hw = ledger.get("hardware")
    proj = ledger.get("projection", {}).get("tasks", [])
    if hw:
        rows = hw["verdicts"]
        dtype = hw["profile"]["dtype"]
        budgets = {"weight_memory": hw["profile"]["weight_memory_bytes"],
                   "activation_memory": hw["profile"]["activation_memory_bytes"],
                   "latency": hw["profile"]["latency_budget_ms"]}
        breaks = next((i for i, v in enumerate(rows) if not v["fits"]), None)
        return {"labels": [v["task"] for v in rows], "future": [v["future"] for v in rows],
                "weight": [v["need"]["weight_bytes"] for v in rows],
                "activation": [v["need"]["activation_bytes"] for v in rows],
                "latency": [v["need"]["latency_ms"] for v in rows], "dtype": dtype,
                "budgets": budgets, "breaks": breaks, "device": hw["profile"]["name"]}
    weight, running = [], 0
    for t in ledger["tasks"]:
        running += t["params_added"]
        weight.append(running * 4)
    weight += [p["network_weight_bytes"]["fp32"] for p in proj]
    return {"labels": [t["task"] for t in ledger["tasks"]] + [p["task"] for p in proj],
            "future": [False] * len(ledger["tasks"]) + [True] * len(proj),
            "weight": weight,
            "activation": [t["activation_bytes"] for t in ledger["tasks"]]
            + [p["activation_bytes"] for p in proj],
            "latency": None, "dtype": "fp32", "budgets": None, "breaks": None, "device": None}


# ----------------------------------------------------------------------------- text
def _n(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.3g}" if abs(v) < 1000 else f"{v:,.0f}"
    if isinstance(v, int):
        return f"{v:,}"
    return str(v)


def _ms(lat: dict[str, Any] | None) -> str:
    if not lat:
        return "-"
    if lat.get("trusted") is False:  # too spread out to be reported as a result
        return f"untrustworthy: spread {lat['q1']:.3f}-{lat['q3']:.3f}"
    return f"{lat['median']:.3f} ({lat['q1']:.3f}-{lat['q3']:.3f})"


def _cost_sections(ledger: dict[str, Any], accuracy: dict[str, Any] | None) -> list[Section]:
    """Costs now, compute, projection, device verdicts, priced options, accuracy matrix."""
    out = []
    conv = ledger["conventions"]
    rows = [["task", "mode", "params added", "params on path", "column", "adapters", "head",
             "MACs (batch 1)", "weights fp32", "weights int8", "peak activations",
             "latency b1 ms (IQR)", "latency b64 ms (IQR)"]]
    for t in ledger["tasks"]:
        p = t["params"]
        rows.append([t["task"], t["mode"], _n(t["params_added"]), _n(t["params_path"]),
                     _n(p["column"]), _n(p["adapters"]), _n(p["head"]), _n(t["macs"]),
                     format_bytes(t["weight_bytes"]["fp32"]),
                     format_bytes(t["weight_bytes"]["int8"]),
                     format_bytes(t["activation_bytes"]), _ms(t["latency_ms"]["batch_1"]),
                     _ms(t["latency_ms"]["batch_64"])])
    tot = ledger["total"]
    rows.append(["whole network, all tasks in one pass", "", _n(tot["params"]),
                 _n(tot["params"]), _n(tot["params_by_part"]["column"]),
                 _n(tot["params_by_part"]["adapters"]), _n(tot["params_by_part"]["head"]),
                 _n(tot["macs"]), format_bytes(tot["weight_bytes"]["fp32"]),
                 format_bytes(tot["weight_bytes"]["int8"]),
                 format_bytes(tot["activation_bytes"]), _ms(tot["latency_ms"]["batch_1"]),
                 _ms(tot["latency_ms"]["batch_64"])])
    out.append(Section("What each task costs now", paragraphs=[
        f"Network {ledger['spec']!r}, input {ledger['input']}, lateral adapters "
        f"{ledger['lateral']}: {ledger['total']['tasks']} tasks on "
        f"{ledger['total']['columns']} columns.",
        conv["macs"] + ".", conv["activation_bytes"] + ".",
        "Latency: " + conv["latency_ms"] + "."], tables=[Table(rows)],
        figures=[Figure("params_per_task.png", "parameters per task")], anchor="costs"))
    out.append(Section("Compute per task", paragraphs=[
        "MACs on each task's inference path at batch 1, by part. " + conv["flops"] + "."],
        figures=[Figure("macs_per_task.png", "MACs per task")]))
    proj = ledger.get("projection")
    if proj:
        prow = [["future task", "column", "width", "params added", "params on path",
                 "MACs on path", "network params", "network fp32", "peak activations"]]
        for p in proj["tasks"]:
            prow.append([p["task"], _n(p["column"]), f"{p['width']:g}", _n(p["params_added"]),
                         _n(p["params_path"]), _n(p["macs"]), _n(p["network_params"]),
                         format_bytes(p["network_weight_bytes"]["fp32"]),
                         format_bytes(p["activation_bytes"])])
        out.append(Section(f"The next {len(proj['tasks'])} tasks",
                           paragraphs=["Growth rule: " + proj["rule"]["text"] + "."],
                           tables=[Table(prow)]))
    hw = ledger.get("hardware")
    paragraphs = []
    vrows = None
    if hw:
        prof = hw["profile"]
        paragraphs.append(
            f"Device {prof['name']!r}" + (f" ({prof['description']})" if prof["description"]
                                          else "")
            + f": weight memory {format_bytes(prof['weight_memory_bytes'])}, activation "
            f"memory {format_bytes(prof['activation_memory_bytes'])}, sustained "
            f"{format_rate(prof['mac_rate_per_s'])}, latency budget "
            f"{prof['latency_budget_ms']:g} ms, deployed at {prof['dtype']}.")
        paragraphs.append("Rule: " + hw["rule"] + ".")
        if hw["already_exceeded"]:
            paragraphs.append(f"Already over budget at task {hw['already_exceeded']!r}.")
        if hw["first_break"]:
            paragraphs.append(f"The first future task that breaks the budget is "
                              f"{hw['first_break']!r}.")
        elif proj:
            paragraphs.append(f"All {len(proj['tasks'])} projected tasks fit.")
        vrows = [["task", "projected", "weights", "activations", "latency ms (estimate)",
                  "verdict"]]
        for v in hw["verdicts"]:
            vrows.append([v["task"], "yes" if v["future"] else "no",
                          format_bytes(v["need"]["weight_bytes"]),
                          format_bytes(v["need"]["activation_bytes"]),
                          f"{v['need']['latency_ms']:.3g}", verdict_text(v)])
    out.append(Section("Growth against the device" if hw else "Projected growth",
                       paragraphs=paragraphs or ["No hardware profile given; pass --hardware "
                                                 "PROFILE to draw the device's budget lines."],
                       tables=[Table(vrows)] if vrows else [],
                       figures=[Figure("growth.png", "growth against the budget")]))
    if hw and hw["options"]:
        orows = [["option", "status", "first task over budget", "weights at last task",
                  "latency ms at last task", "note"]]
        for o in hw["options"]:
            last = o["last"] or {}
            orows.append([o["what"], o["status"], o["first_break"] or "none (all fit)",
                          format_bytes(last.get("weight_bytes", 0)),
                          f"{last.get('latency_ms', 0):.3g}", o["note"] or ""])
        out.append(Section("Options, priced",
                           paragraphs=["Each option re-projects the same future tasks."],
                           tables=[Table(orows)]))
    if accuracy:
        acc = ", ".join(f"{k} {accuracy[k]:+.4f}" if k != "ACC" else f"ACC {accuracy[k]:.4f}"
                        for k in ("ACC", "BWT", "FWT") if accuracy.get(k) is not None)
        out.append(Section("Accuracy matrix", paragraphs=[
            f"R[i][j]: validation accuracy on task j after growing task i "
            f"({accuracy.get('definition', 'Lopez-Paz & Ranzato 2017')})."
            + (f" {acc}." if acc else "")
            + " Hatched cells: a task measured on the untrained start of its own parts, "
              "before training; grey: the task did not exist yet."],
            figures=[Figure("accuracy.png", "accuracy matrix", large=len(accuracy["tasks"]) > 6)]))
    return out


# ----------------------------------------------------------------------------- public
def build_report(net: ProgressiveNet, name: str, hardware: Any = None,
                 project_n: int = DEFAULT_PROJECT, latency: bool = True, repeats: int = 20,
                 check: Mapping[str, Any] | None = None, record: Mapping[str, Any] | None = None,
                 changes: Section | None = None, changes_data: Any = None, pdf: bool = True,
                 threads: int = 1) -> dict[str, bytes]:
    """Every report file by name, as bytes (nothing is written).

    ``check`` is the result of a fresh ``check`` of the workspace (``CheckReport.to_dict``),
    run by the caller that opened it; ``record`` the record's own verification;
    ``changes`` a "what changed" section (``diff``) to put after the history.
    """
    generated = now()
    ledger = cost_network(net, project_n=project_n if net.tasks else 0, hardware=hardware,
                          latency=latency, repeats=repeats, threads=threads)
    accuracy = accuracy_record(net)
    proj = ledger.get("projection", {}).get("tasks", [])
    figures: dict[str, bytes] = {}
    notes = []
    if ledger["tasks"]:
        figures["params_per_task.png"] = params_per_task(ledger["tasks"], proj)
        figures["macs_per_task.png"] = macs_per_task(ledger["tasks"], proj)
        figures["growth.png"] = projected_growth(_growth_series(ledger))
    else:
        notes.append("The workspace has no task yet, so there is nothing to plot.")
    if accuracy:
        figures["accuracy.png"] = accuracy_heatmap(accuracy["tasks"], accuracy["R"])
    else:
        notes.append("No accuracy matrix: the workspace holds no per-task validation "
                     "record yet.")
    seals, confusion = seal_sections(net, check)
    figures.update(confusion)
    sections = [summary_section(net, check, ledger, record, generated), *seals,
                timeline_section(net, record)]
    if changes is not None:
        sections.append(changes)
    sections += _cost_sections(ledger, accuracy)
    extra: dict[str, bytes] = {}  # files written beside the report, not shown in it
    svg, why = diagram_svg(net)
    if svg is not None:
        # The pages show the PNG (a picture, so no diagram label can pass for report text);
        # the SVG is written beside it for zooming in.
        extra["architecture.svg"] = svg
        png, why = diagram_svg(net, "png")
    if svg is not None and png is not None:
        figures["architecture.png"] = png
        sections.append(Section("Architecture", paragraphs=[
            "The same diagram as a vector drawing, to zoom into: architecture.svg."],
            figures=[Figure("architecture.png", "architecture", large=True)]))
    else:
        notes.append(f"No architecture diagram: {why}.")
    title = f"colonnade report: {name}"
    notes.append(f"Generated {generated} by colonnade {__version__}. Costs are derived from "
                 f"shapes; latency is measured on the machine that wrote this report"
                 + (f", with {threads} thread{'s' * (threads != 1)}." if latency else "."))
    noisy = [t["task"] for t in ledger["tasks"] + [dict(ledger["total"], task="one pass")]
             if any((t["latency_ms"].get(b) or {}).get("trusted") is False
                    for b in ("batch_1", "batch_64"))]
    if noisy:
        notes.append(f"Latency of {', '.join(noisy)} is marked untrustworthy: its "
                     f"interquartile range exceeded {SPREAD_LIMIT:g} x its median, so the "
                     f"machine was too busy for a figure; measure again on a quiet machine.")
    data = {"title": title, "generated": generated, "colonnade": __version__,
            "evidence": evidence_data(net, check, record, generated), "ledger": ledger,
            "accuracy": accuracy, "changes": changes_data, "figures": sorted(figures),
            "notes": notes}
    files = {**figures, **extra}
    files["report.md"] = to_markdown(title, sections, figures, notes).encode("utf-8")
    page = to_html(title, sections, figures, notes, f"workspace: {name}",
                   f"generated {generated}")
    files["report.html"] = page.encode("utf-8")
    files["report.json"] = (json.dumps(data, indent=2, default=str) + "\n").encode("utf-8")
    if pdf:
        files["report.pdf"] = html_to_pdf(page)
    return files
