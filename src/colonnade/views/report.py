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

import base64
import html
import json
from typing import Any

from .._version import __version__
from ..clock import now
from ..costing.hardware import format_bytes, format_rate, verdict_text
from ..costing.ledger import cost_network
from ..evidence.transfer import record
from ..model.guard import sealed_tasks
from ..model.network import ProgressiveNet
from .draw import to_dot
from .plots import accuracy_heatmap, macs_per_task, params_per_task, projected_growth

__all__ = ["build_report", "accuracy_record", "diagram_svg", "REPORT_FILES"]

REPORT_FILES = ("report.md", "report.html", "report.json")
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


def diagram_svg(net: ProgressiveNet) -> tuple[bytes | None, str]:
    """The architecture diagram as SVG, or None and the reason it is missing."""
    if not net.columns:
        return None, "the network has no column yet"
    try:
        import graphviz
    except ImportError:
        return None, "the graphviz Python package is not installed (pip install graphviz)"
    try:
        dot = to_dot(net, compact=len(net.columns) > 4)
        return dot.pipe(format="svg", engine="dot", quiet=True), ""
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
    return f"{lat['median']:.3f} ({lat['q1']:.3f}-{lat['q3']:.3f})"


def _sections(ledger: dict[str, Any], accuracy: dict[str, Any] | None,
              ) -> list[tuple[str, list[str], list[list[str]] | None, str]]:
    """(title, paragraphs, table rows with a header row first, figure name) per section."""
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
    out.append(("What each task costs now",
                [f"Network {ledger['spec']!r}, input {ledger['input']}, lateral adapters "
                 f"{ledger['lateral']}: {ledger['total']['tasks']} tasks on "
                 f"{ledger['total']['columns']} columns.",
                 conv["macs"] + ".", conv["activation_bytes"] + ".",
                 "Latency: " + conv["latency_ms"] + "."], rows, "params_per_task.png"))
    out.append(("Compute per task", ["MACs on each task's inference path at batch 1, by "
                                     "part. " + conv["flops"] + "."], None,
                "macs_per_task.png"))
    proj = ledger.get("projection")
    if proj:
        prow = [["future task", "column", "width", "params added", "params on path",
                 "MACs on path", "network params", "network fp32", "peak activations"]]
        for p in proj["tasks"]:
            prow.append([p["task"], _n(p["column"]), f"{p['width']:g}", _n(p["params_added"]),
                         _n(p["params_path"]), _n(p["macs"]), _n(p["network_params"]),
                         format_bytes(p["network_weight_bytes"]["fp32"]),
                         format_bytes(p["activation_bytes"])])
        out.append((f"The next {len(proj['tasks'])} tasks",
                    ["Growth rule: " + proj["rule"]["text"] + "."], prow, None))
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
    out.append(("Growth against the device" if hw else "Projected growth",
                paragraphs or ["No hardware profile given; pass --hardware PROFILE to "
                               "draw the device's budget lines."], vrows, "growth.png"))
    if hw and hw["options"]:
        orows = [["option", "status", "first task over budget", "weights at last task",
                  "latency ms at last task", "note"]]
        for o in hw["options"]:
            last = o["last"] or {}
            orows.append([o["what"], o["status"], o["first_break"] or "none (all fit)",
                          format_bytes(last.get("weight_bytes", 0)),
                          f"{last.get('latency_ms', 0):.3g}", o["note"] or ""])
        out.append(("Options, priced", ["Each option re-projects the same future tasks."],
                    orows, None))
    if accuracy:
        acc = ", ".join(f"{k} {accuracy[k]:+.4f}" if k != "ACC" else f"ACC {accuracy[k]:.4f}"
                        for k in ("ACC", "BWT", "FWT") if accuracy.get(k) is not None)
        out.append(("Accuracy matrix",
                    [f"R[i][j]: validation accuracy on task j after growing task i "
                     f"({accuracy.get('definition', 'Lopez-Paz & Ranzato 2017')})."
                     + (f" {acc}." if acc else "")], None, "accuracy.png"))
    return out


def _markdown(title: str, sections: list, figures: dict[str, bytes], notes: list[str]) -> str:
    lines = [f"# {title}", ""]
    for name, paragraphs, rows, figure in sections:
        lines += [f"## {name}", ""]
        for p in paragraphs:
            lines += [p, ""]
        if rows:
            lines.append("| " + " | ".join(rows[0]) + " |")
            lines.append("|" + "---|" * len(rows[0]))
            for r in rows[1:]:
                lines.append("| " + " | ".join(c.replace("|", "\\|") for c in r) + " |")
            lines.append("")
        if figure and figure in figures:
            lines += [f"![{name}]({figure})", ""]
    if "architecture.svg" in figures:
        lines += ["## Architecture", "", "![architecture](architecture.svg)", ""]
    for n in notes:
        lines += [f"*{n}*", ""]
    return "\n".join(lines)


_CSS = """body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;
margin:2em auto;padding:0 1em;color:#222;line-height:1.45}
h1{font-size:1.6em;border-bottom:2px solid #0072B2;padding-bottom:.2em}
h2{font-size:1.2em;margin-top:1.8em;color:#0072B2}
table{border-collapse:collapse;font-size:.85em;margin:.6em 0;display:block;overflow-x:auto}
th,td{border:1px solid #ddd;padding:.25em .55em;text-align:right;white-space:nowrap}
th{background:#f3f6fa}td:first-child,th:first-child{text-align:left}
img{max-width:100%;height:auto;margin:.5em 0}.note{color:#666;font-style:italic}"""


def _img(name: str, data: bytes, alt: str) -> str:
    mime = "image/svg+xml" if name.endswith(".svg") else "image/png"
    return (f'<img alt="{html.escape(alt)}" '
            f'src="data:{mime};base64,{base64.b64encode(data).decode("ascii")}">')


def _html(title: str, sections: list, figures: dict[str, bytes], notes: list[str]) -> str:
    e = html.escape
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{e(title)}</title><style>{_CSS}</style></head><body>",
             f"<h1>{e(title)}</h1>"]
    for name, paragraphs, rows, figure in sections:
        parts.append(f"<h2>{e(name)}</h2>")
        parts += [f"<p>{e(p)}</p>" for p in paragraphs]
        if rows:
            parts.append("<table><thead><tr>" + "".join(f"<th>{e(c)}</th>" for c in rows[0])
                         + "</tr></thead><tbody>")
            parts += ["<tr>" + "".join(f"<td>{e(c)}</td>" for c in r) + "</tr>"
                      for r in rows[1:]]
            parts.append("</tbody></table>")
        if figure and figure in figures:
            parts.append(_img(figure, figures[figure], name))
    if "architecture.svg" in figures:
        parts += ["<h2>Architecture</h2>",
                  _img("architecture.svg", figures["architecture.svg"], "architecture")]
    parts += [f'<p class="note">{e(n)}</p>' for n in notes]
    parts.append("</body></html>")
    return "\n".join(parts)


# ----------------------------------------------------------------------------- public
def build_report(net: ProgressiveNet, name: str, hardware: Any = None,
                 project_n: int = DEFAULT_PROJECT, latency: bool = True, repeats: int = 20,
                 ) -> dict[str, bytes]:
    """Every report file by name, as bytes (nothing is written)."""
    ledger = cost_network(net, project_n=project_n if net.tasks else 0, hardware=hardware,
                          latency=latency, repeats=repeats)
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
    svg, why = diagram_svg(net)
    if svg is not None:
        figures["architecture.svg"] = svg
    else:
        notes.append(f"No architecture diagram: {why}.")
    title = f"colonnade report: {name}"
    sections = _sections(ledger, accuracy)
    notes.append(f"Generated {now()} by colonnade {__version__}. Costs are derived from "
                 f"shapes; latency is measured on the machine that wrote this report.")
    data = {"title": title, "generated": now(), "colonnade": __version__, "ledger": ledger,
            "accuracy": accuracy, "figures": sorted(figures), "notes": notes}
    files = {n: d for n, d in figures.items()}
    files["report.md"] = _markdown(title, sections, figures, notes).encode("utf-8")
    files["report.html"] = _html(title, sections, figures, notes).encode("utf-8")
    files["report.json"] = (json.dumps(data, indent=2, default=str) + "\n").encode("utf-8")
    return files
