"""Verbs that read and render: ``cost``, ``report``, ``draw``."""

from __future__ import annotations

import argparse
from typing import Any

from .argtypes import (
    class_count,
    positive_float,
    positive_int,
)
from .output import print_json, table

__all__ = ["add_parsers"]


def _bytes(n: float | None) -> str:
    from ..costing.hardware import format_bytes

    return "-" if n is None else format_bytes(n)


def _latency_cell(lat: dict[str, Any] | None) -> str:
    if not lat:
        return "-"
    if lat.get("trusted") is False:  # too spread out to be a result
        return f"noisy ({lat['q1']:.3f}-{lat['q3']:.3f})"
    return f"{lat['median']:.3f} ({lat['q1']:.3f}-{lat['q3']:.3f})"


def _print_costs(led: dict[str, Any]) -> None:
    rows = []
    for t in led["tasks"] + [dict(led["total"], task="whole network, one pass", mode="all",
                                  params_added=led["total"]["params"],
                                  params_path=led["total"]["params"],
                                  params=led["total"]["params_by_part"])]:
        p = t["params"]
        rows.append([t["task"], t["mode"], t["params_added"], t["params_path"], p["column"],
                     p["adapters"], p["head"], p["frozen"], p["trainable"],
                     t["buffers"]["elements"]])
    print(table(rows, ["task", "mode", "params added", "params on path", "column", "adapters",
                       "head", "frozen", "trainable", "buffers"]))
    print()
    rows = [[t["task"], t["macs"], _bytes(t["weight_bytes"]["fp32"]),
             _bytes(t["weight_bytes"]["fp16"]), _bytes(t["weight_bytes"]["int8"]),
             _bytes(t["activation_bytes"]), _latency_cell(t["latency_ms"]["batch_1"]),
             _latency_cell(t["latency_ms"]["batch_64"])]
            for t in led["tasks"] + [dict(led["total"], task="whole network, one pass")]]
    threads = led.get("latency_threads")
    on = f", {threads} thread{'s' * (threads != 1)}" if threads else ""
    print(table(rows, ["task", "MACs", "weights fp32", "fp16/bf16", "int8",
                       "peak activations", f"latency b1 ms (IQR){on}", f"b64 ms (IQR){on}"]))
    lats = [t["latency_ms"][b] for t in led["tasks"] + [led["total"]]
            for b in ("batch_1", "batch_64") if t["latency_ms"][b]]
    if any(lat.get("trusted") is False for lat in lats):
        print(f"noisy: that latency's interquartile range is wider than "
              f"{lats[0]['spread_limit']:g} x its median, so the machine was too busy for a "
              f"figure; measure again on a quiet machine or with more --repeats")
    print(f"one pass over all tasks: {led['total']['macs']:,} MACs; each task run alone: "
          f"{led['total']['macs_separate']:,} MACs in all")


def _print_projection(proj: dict[str, Any]) -> None:
    print(f"projection: {proj['rule']['text']}")
    print()
    print(table([[p["task"], p["column"], f"{p['width']:g}", p["params_added"], p["params_path"],
                  p["macs"], p["network_params"], _bytes(p["network_weight_bytes"]["fp32"]),
                  _bytes(p["activation_bytes"])] for p in proj["tasks"]],
                ["future task", "column", "width", "params added", "params on path",
                 "MACs on path", "network params", "network fp32", "peak activations"]))


def _print_hardware(hw: dict[str, Any], projected: bool) -> None:
    from ..costing.hardware import format_rate, verdict_text

    prof = hw["profile"]
    print(f"device {prof['name']}: weights {_bytes(prof['weight_memory_bytes'])}, activations "
          f"{_bytes(prof['activation_memory_bytes'])}, {format_rate(prof['mac_rate_per_s'])}, "
          f"latency budget {prof['latency_budget_ms']:g} ms, dtype {prof['dtype']}")
    print(f"rule: {hw['rule']}")
    print()
    print(table([[v["task"], "yes" if v["future"] else "no", _bytes(v["need"]["weight_bytes"]),
                  _bytes(v["need"]["activation_bytes"]), round(v["need"]["latency_ms"], 4),
                  verdict_text(v)] for v in hw["verdicts"]],
                ["task", "projected", "weights", "activations", "latency ms (est.)",
                 "verdict"]))
    if hw["already_exceeded"]:
        print(f"already over budget at task {hw['already_exceeded']!r}")
    if hw["first_break"]:
        print(f"first future task over budget: {hw['first_break']}")
    elif projected:
        print("every projected task fits")
    else:
        print("project future tasks with --project N to find the first one over budget")
    if hw["options"]:
        print()
        print("options, each re-projecting the same future tasks:")
        print(table([[o["name"], o["status"], o["first_break"] or "none, all fit",
                      _bytes((o["last"] or {}).get("weight_bytes")),
                      round((o["last"] or {}).get("latency_ms", 0.0), 4), o["note"]]
                     for o in hw["options"]],
                    ["option", "status", "first over budget", "weights at last",
                     "latency ms at last", "note"]))


def _cost(args: argparse.Namespace) -> int:
    from ..app.views import cost_workspace

    led = cost_workspace(args.workspace, project_n=args.project or 0, width=args.width,
                         hardware=args.hardware, classes=args.classes,
                         latency=not args.no_latency, repeats=args.repeats,
                         threads=args.threads)
    if args.json:
        print_json(led)
        return 0
    print(f"workspace {led['workspace']}: spec {led['spec']!r}, lateral {led['lateral']}; "
          f"costs per inference at batch 1")
    print(f"{led['conventions']['macs']}")
    if not led["tasks"]:
        print("no tasks yet; grow one with 'colonnade grow WS --task NAME --train FILE'")
    else:
        print()
        _print_costs(led)
    if "projection" in led:
        print()
        _print_projection(led["projection"])
    if "hardware" in led:
        print()
        _print_hardware(led["hardware"], "projection" in led)
    return 0


def _report(args: argparse.Namespace) -> int:
    from ..app.views import write_report

    result = write_report(args.workspace, args.output, hardware=args.hardware,
                          project_n=args.project, latency=not args.no_latency,
                          repeats=args.repeats, since=args.since, pdf=not args.no_pdf,
                          check=not args.no_check, threads=args.threads, trust=args.trust)
    print(f"wrote {', '.join(result['files'])} to {result['output']}")
    return 0


def _draw(args: argparse.Namespace) -> int:
    from ..app.views import draw_workspace

    result = draw_workspace(args.workspace, args.output, task=args.task, compact=args.compact,
                            direction=args.direction, show_removed=args.show_pruned)
    what = "compact diagram" if result["compact"] else "diagram"
    focus = f", focused on task {result['task']!r}" if result["task"] else ""
    print(f"wrote the {what} ({result['format']}{focus}) to {result['output']}")
    return 0


def _latency_flags(p: argparse.ArgumentParser) -> None:
    """The latency measurement's flags, shared by ``cost`` and ``report``."""
    p.add_argument("--repeats", type=positive_int, default=20,
                   help="timed calls per latency figure (default 20)")
    p.add_argument("--no-latency", action="store_true", help="skip the latency measurement")
    p.add_argument("--threads", type=positive_int, default=1,
                   help="torch threads while latency is measured (default 1; stated beside "
                        "every figure)")


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("cost", _cost, "what each task costs (parameters, bytes, MACs, activation "
                            "memory, latency), projected growth and a device verdict")
    p.add_argument("workspace")
    p.add_argument("--json", action="store_true", help="print the ledger as JSON")
    p.add_argument("--project", type=positive_int, metavar="N",
                   help="also project N future tasks grown by the spec's rule")
    p.add_argument("--width", type=positive_float, metavar="F",
                   help="with --project: the width factor of future columns (default: the "
                        "newest column's)")
    p.add_argument("--classes", type=class_count, metavar="N",
                   help="with --project: classes of each future task (default: the newest "
                        "task's)")
    p.add_argument("--hardware", metavar="PROFILE",
                   help="a hardware profile YAML, or a name in specs/hardware/")
    _latency_flags(p)

    p = verb("report", _report, "write the review pack: report.md, a self-contained "
                                "report.html, report.pdf and report.json with plots; the "
                                "evidence (seals, a fresh check, the history) first")
    p.add_argument("workspace")
    p.add_argument("-o", "--output", required=True, help="folder for the report files")
    p.add_argument("--since", metavar="ENTRY",
                   help="add what changed since history entry ENTRY (as 'colonnade diff "
                        "WS --since ENTRY' prints it)")
    p.add_argument("--no-pdf", action="store_true", help="skip report.pdf")
    p.add_argument("--trust", action="append", metavar="KEY.pub",
                   help="check the record's signatures against this public key (repeatable)")
    p.add_argument("--no-check", action="store_true",
                   help="do not repeat the seals' computations for the report (it says so)")
    p.add_argument("--hardware", metavar="PROFILE",
                   help="a hardware profile YAML, or a name in specs/hardware/")
    p.add_argument("--project", type=positive_int, default=10, metavar="N",
                   help="future tasks to project (default 10)")
    _latency_flags(p)

    p = verb("draw", _draw, "draw the grown network for a design review (.svg, .png, .pdf, "
                            "or .dot source)")
    p.add_argument("workspace")
    p.add_argument("-o", "--output", required=True,
                   help="FILE.svg, FILE.png or FILE.pdf (rendered by graphviz's dot), or "
                        "FILE.dot (the source)")
    p.add_argument("--task", help="highlight this task's closure and fade the rest")
    view = p.add_mutually_exclusive_group()
    view.add_argument("--compact", action="store_true", default=None,
                      help="one box per column, the adapters between each pair of columns "
                           "bundled into one labelled box (default from 8 tasks on)")
    view.add_argument("--full", dest="compact", action="store_false",
                      help="every layer of every column, however many tasks")
    p.add_argument("--direction", choices=["BT", "TB", "LR", "RL"], default="BT",
                   type=str.upper, help="where data flows: BT bottom to top (default), TB "
                                        "top to bottom, LR left to right, RL right to left")
    p.add_argument("--show-pruned", action="store_true",
                   help="draw pruned and merged adapters dotted and faint (default: hidden)")

