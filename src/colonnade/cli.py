"""The command line: each verb parses its flags, calls one library function, and formats.

No logic lives here. Every expected failure is a ColonnadeError, printed as one sentence
with a non-zero exit code; Ctrl-C exits 130 and, because workspaces are only written at
the end of an action, leaves them as they were.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any

from . import __version__
from .errors import ColonnadeError

__all__ = ["main", "build_parser"]


# ----------------------------------------------------------------------------- helpers
def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}") from None
    if value <= 0:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {value}")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not value > 0 or math.isinf(value):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text}")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of at least 0, got {text!r}"
                                         ) from None
    if not value >= 0 or math.isinf(value):
        raise argparse.ArgumentTypeError(f"expected a finite number of at least 0, got {text}")
    return value


def _class_count(text: str) -> int:
    value = _positive_int(text)
    if value < 2:
        raise argparse.ArgumentTypeError(f"a task needs at least 2 classes, got {value}")
    return value


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


def _print_json(data: Any) -> None:
    print(json.dumps(data, indent=2, default=str))


# ----------------------------------------------------------------------------- verbs
def _new(args: argparse.Namespace) -> int:
    from .workspace import new_workspace

    net = new_workspace(args.spec, args.output)
    print(f"created workspace {args.output} from spec {net.spec.name!r} "
          f"(input {list(net.input_shape)}, {len(net.spec.column)} template layers, "
          f"lateral {net.spec.lateral.kind})")
    return 0


def _grow(args: argparse.Namespace) -> int:
    from .workspace import grow_workspace

    entry = grow_workspace(args.workspace, args.task, args.train, val=args.val, mode=args.mode,
                           on=args.on, width=args.width, classes=args.classes,
                           epochs=args.epochs, device=args.device, progress=not args.quiet,
                           cache=False if args.no_cache else None, cache_mb=args.cache_mb,
                           target=args.target, nproc=args.nproc)
    if entry is None:  # a torchrun rank other than 0: rank 0 reports
        return 0
    what = (f"a column (column {entry['column']}, width {entry['width']:g})"
            if entry["step"] == "column_added" else f"a head on column {entry['column']}")
    print(f"grew task {entry['task']!r} as {what}: {entry['params_added']:,} new parameters, "
          f"validation accuracy {entry['val_accuracy']:.4f}")
    if "auto" in entry:
        print(f"auto: chose a {entry['auto']['chose']}: {entry['auto']['reason']}")
    return 0


def _show(args: argparse.Namespace) -> int:
    from .workspace import describe

    info = describe(args.workspace)
    if args.json:
        _print_json(info)
        return 0
    p = info["parameters"]
    print(f"workspace {info['workspace']}: spec {info['spec']!r}, input {info['input']}, "
          f"lateral {info['lateral']}")
    if not info["tasks"]:
        print("no tasks yet; grow one with 'colonnade grow WS --task NAME --train FILE'")
    else:
        print()
        print(table([[t["task"], t["mode"], t["column"], t["classes"], t["params_path"],
                      ",".join(map(str, t["closure_columns"])), t["val_accuracy"],
                      f"v{t['seal']}" if t.get("seal") else "-"]
                     for t in info["tasks"]],
                    ["task", "mode", "column", "classes", "params on path", "closure columns",
                     "val accuracy", "seal"]))
        print()
        print(table([[c["column"], c["task"], f"{c['width']:g}", c["params"]]
                     for c in info["columns"]],
                    ["column", "grown by", "width", "params"]))
        live = [a for a in info["adapters"] if a["state"] == "live"]
        print()
        print(f"{len(live)} live lateral adapters, "
              f"{sum(a['params'] for a in live):,} parameters")
        _print_transfer(info["transfer"])
    print(f"parameters: {p['total']:,} total = {p['columns']:,} columns + "
          f"{p['adapters']:,} adapters + {p['heads']:,} heads")
    return 0


def _predict(args: argparse.Namespace) -> int:
    from .workspace import predict_file

    result = predict_file(args.workspace, args.task, args.data, args.output,
                          all_tasks=args.all)
    if args.all:
        print(f"wrote logits and predictions of {len(result['tasks'])} tasks "
              f"({', '.join(result['tasks'])}) for {result['samples']} samples to "
              f"{result['output']} (arrays logits_TASK, pred_TASK)")
        return 0
    msg = f"wrote logits and predictions of task {result['task']!r} for " \
          f"{result['samples']} samples to {result['output']}"
    if "accuracy" in result:
        msg += f"; accuracy {result['accuracy']:.4f}"
    print(msg)
    return 0


def _metric(value: float | None) -> str:
    return "-" if value is None else f"{value:+.4f}"


def _print_transfer(rec: dict[str, Any]) -> None:
    """The accuracy matrix R, the random-network row b, and ACC / BWT / FWT."""
    tasks = rec["tasks"]
    if not tasks:
        return
    print()
    print("continual-learning record on validation data (row: after growing that task; "
          "Lopez-Paz & Ranzato 2017)")
    rows = [[t, *rec["R"][i]] for i, t in enumerate(tasks)]
    rows.append(["random network", *rec["random_init"]])
    print(table(rows, ["after \\ on", *tasks]))
    acc = "-" if rec["ACC"] is None else f"{rec['ACC']:.4f}"
    sealed = "" if rec["BWT_sealed"] is None else f" (sealed tasks {_metric(rec['BWT_sealed'])})"
    print(f"ACC {acc}   BWT {_metric(rec['BWT'])}{sealed}   FWT {_metric(rec['FWT'])}")


def _seal(args: argparse.Namespace) -> int:
    from .seal import seal_workspace

    entry = seal_workspace(args.workspace, args.task, args.probe, device=args.device)
    m, c = entry["metrics"], entry["closure"]
    print(f"sealed task {entry['task']!r} as seal v{entry['version']}: closure SHA-256 "
          f"{c['sha256'][:16]}... over {len(c['tensors'])} tensors, probe accuracy "
          f"{m['accuracy']:.4f} on {entry['probe']['samples']} samples")
    return 0


def _diff(value: float | None) -> str:
    if value is None:
        return "-"
    return "0" if value == 0 else f"{value:.3g}"


def _check(args: argparse.Namespace) -> int:
    from .verify import check_workspace

    report = check_workspace(args.workspace, task=args.task, tolerance=args.tolerance,
                             probe=args.probe)
    if args.json:
        _print_json(report.to_dict())
        return 0 if report.passed else 1
    print(table([[t.task, f"v{t.version}", t.verdict, _diff(t.max_abs_diff),
                  "-" if t.predictions_agree is None else ("yes" if t.predictions_agree
                                                           else "no")]
                 for t in report.tasks],
                ["task", "seal", "verdict", "max |diff|", "classes agree"]))
    for t in report.tasks:
        for sentence in t.failures:
            print(f"{t.task}: {sentence}.")
        for sentence in t.notes:
            print(f"{t.task}: note: {sentence}.")
    for sentence in report.notes:
        print(f"note: {sentence}.")
    n, passed = len(report.tasks), sum(t.passed for t in report.tasks)
    exact = sum(t.verdict == "exact" for t in report.tasks)
    if exact == n:
        print(f"all {n} sealed task(s) check exact")
    elif report.passed:
        print(f"all {n} sealed task(s) pass: {exact} exact, {n - exact} within the tolerance")
    else:
        print(f"{n - passed} of {n} sealed task(s) fail")
    return 0 if report.passed else 1


def _unseal(args: argparse.Namespace) -> int:
    from .seal import unseal_workspace

    step = unseal_workspace(args.workspace, args.task, args.reason)
    print(f"unsealed task {step['task']!r} (seal v{step['version']}) at {step['time']}; "
          f"reason recorded: {step['reason']}")
    return 0


def _export(args: argparse.Namespace) -> int:
    from .export import export_task

    r = export_task(args.workspace, args.task, args.output)
    seal = f"seal v{r['seal']['version']}" if r["seal"] else "not sealed"
    print(f"exported task {r['task']!r} to {r['output']} ({r['format']}, {r['bytes']:,} bytes): "
          f"columns {','.join(map(str, r['columns']))}, {r['adapters']} adapters, "
          f"{r['parameters']:,} values in {r['tensors']} tensors; closure SHA-256 "
          f"{r['closure_sha256'][:16]}..., {seal}")
    return 0


def _bytes(n: float | None) -> str:
    from .hardware import format_bytes

    return "-" if n is None else format_bytes(n)


def _latency_cell(lat: dict[str, Any] | None) -> str:
    if not lat:
        return "-"
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
    print(table(rows, ["task", "MACs", "weights fp32", "fp16/bf16", "int8",
                       "peak activations", "latency b1 ms (IQR)", "b64 ms (IQR)"]))
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
    from .hardware import format_rate, verdict_text

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
    from .ledger import cost_workspace

    led = cost_workspace(args.workspace, project_n=args.project or 0, width=args.width,
                         hardware=args.hardware, classes=args.classes,
                         latency=not args.no_latency, repeats=args.repeats)
    if args.json:
        _print_json(led)
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
    from .report import write_report

    result = write_report(args.workspace, args.output, hardware=args.hardware,
                          project_n=args.project, latency=not args.no_latency,
                          repeats=args.repeats)
    print(f"wrote {', '.join(result['files'])} to {result['output']}")
    return 0


def _draw(args: argparse.Namespace) -> int:
    from .draw import draw_workspace

    result = draw_workspace(args.workspace, args.output, task=args.task, compact=args.compact,
                            direction=args.direction, show_removed=args.show_pruned)
    what = "compact diagram" if result["compact"] else "diagram"
    focus = f", focused on task {result['task']!r}" if result["task"] else ""
    print(f"wrote the {what} ({result['format']}{focus}) to {result['output']}")
    return 0


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 0, got {value}")
    return value


def _usage(args: argparse.Namespace) -> int:
    from .usage import usage_workspace

    r = usage_workspace(args.workspace, args.task, args.data, plot=args.plot, noise=args.noise,
                        repeats=args.repeats)
    if args.json:
        _print_json(r)
        return 0
    print(f"adapter use for task {r['task']!r} on {r['samples']} samples of {args.data}: "
          f"accuracy {r['accuracy']:.4f}, loss {r['loss']:.4f}")
    print()
    print(table([[a["key"], "+".join(f"c{s}" for s in a["sources"]), a["layer"], a["params"],
                  100 * a["ablation_accuracy_drop"], a["ablation_loss_rise"],
                  100 * a["mean_ablation_accuracy_drop"], a["score"], a["share"],
                  a["varying_share"], a["aps"]]
                 for a in sorted(r["adapters"], key=lambda a: -a["score"])],
                ["adapter", "from", "into", "params", "zeroed -acc pts", "zeroed +loss",
                 "mean -acc pts", "mean +loss (score)", "share", "varying share", "APS"]))
    print("zeroed / mean: the adapter's output replaced by zeros / by its mean per channel; "
          "share: mean |adapter output| / |pre-activation|, varying share: the same with "
          "means removed; APS: loss rise under noise scaled to each input feature's "
          "variance, normalised per layer (Rusu et al. 2016); sorted by score")
    if args.plot:
        print(f"heat map written to {args.plot}")
    return 0


def _trim(args: argparse.Namespace) -> int:
    from .trim import trim_workspace

    r = trim_workspace(args.workspace, args.task, args.data, max_drop=args.max_drop,
                       target_params=args.target_params, target_macs=args.target_macs,
                       finetune=args.finetune or 0, train=args.train, merge=args.merge,
                       progress=not args.quiet)
    if args.json:
        _print_json(r)
        return 0
    rows = []
    for s in r["steps"]:
        what = ", ".join(s["adapters"]) if s["adapters"] else "-"
        if s["step"] == "adapters_merged":
            what += (f" -> {s['detail']['into']} (rank {s['detail']['rank']}, error "
                     f"{s['detail']['error']:.4f})")
        rows.append([s["step"], what, s["params_saved"], s["macs_saved"], s["accuracy"]])
    if rows:
        print(table(rows, ["step", "adapters", "params saved", "MACs saved", "accuracy"]))
        print()
    for key, why in r["kept"].items():
        print(f"kept {key}: {why}")
    for m in r["merges_rejected"]:
        print(f"not merged {', '.join(m['adapters'])}: {m['reason']}")
    dropped = r["columns_dropped"]
    print(f"task {r['task']!r} on {r['samples']} samples: accuracy {r['accuracy_before']:.4f} "
          f"-> {r['accuracy_after']:.4f} ({r['accuracy_change_points']:+.2f} points, at most "
          f"-{r['max_drop']:g} allowed); parameters on its path {r['params_before']:,} -> "
          f"{r['params_after']:,} ({r['params_saved']:,} saved); MACs {r['macs_before']:,} -> "
          f"{r['macs_after']:,} ({r['macs_saved']:,} saved)"
          + (f"; columns {', '.join(map(str, dropped))} left its path" if dropped else ""))
    print(f"stopped: {r['stopped']}" + ("" if r["steps"] else "; nothing changed, the "
                                                               "workspace was not written"))
    return 0


# ----------------------------------------------------------------------------- parser
def _latency_flags(p: argparse.ArgumentParser) -> None:
    """The latency measurement's flags, shared by ``cost`` and ``report``."""
    p.add_argument("--repeats", type=_positive_int, default=20,
                   help="timed calls per latency figure (default 20)")
    p.add_argument("--no-latency", action="store_true", help="skip the latency measurement")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="colonnade",
        description="Grow a progressive network one column per task; earlier tasks stay "
                    "bit-identical.")
    parser.add_argument("--version", action="version", version=f"colonnade {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True

    def verb(name: str, run: Callable[[argparse.Namespace], int], help: str,
             ) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help, description=help)
        p.set_defaults(run=run)
        return p

    p = verb("new", _new, "create a workspace from a spec")
    p.add_argument("spec", help="the YAML spec")
    p.add_argument("-o", "--output", required=True, help="the new workspace folder")

    p = verb("grow", _grow, "add a column or a head for a new task and train it")
    p.add_argument("workspace")
    p.add_argument("--task", required=True, help="name of the new task")
    p.add_argument("--train", required=True, help="training data (.npz or .csv)")
    p.add_argument("--val", help="validation data; default: x_val/y_val in the file, "
                                 "else a stratified split")
    p.add_argument("--mode", choices=["column", "head", "auto"], default="column",
                   help="auto: a head if it reaches --target on validation data, else a "
                        "column")
    p.add_argument("--target", type=_positive_float, metavar="ACCURACY",
                   help="with --mode auto: the validation accuracy (0-1) a head must reach")
    p.add_argument("--on", help="with --mode head or auto: the task whose column carries the "
                                "head (default: the newest column)")
    p.add_argument("--width", type=_positive_float, default=1.0,
                   help="width factor of the new column against the template")
    p.add_argument("--classes", type=_class_count, help="class count (default: from labels)")
    p.add_argument("--epochs", type=_positive_int, help="override the spec's epochs")
    p.add_argument("--device", default="cpu", help="cpu (default) or cuda")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--nproc", type=_positive_int,
                   help="train data-parallel with N local worker processes (torch.distributed: "
                        "gloo on cpu, nccl on cuda)")
    p.add_argument("--cache-mb", type=_non_negative_float,
                   help="memory cap (MiB) for cached frozen-column outputs; beyond it they "
                        "spill to a temporary file (default: the spec's train.cache_mb)")
    p.add_argument("--no-cache", action="store_true",
                   help="recompute frozen columns every batch instead of caching them")

    p = verb("show", _show, "print tasks, columns, heads, adapters and parameter counts")
    p.add_argument("workspace")
    p.add_argument("--json", action="store_true")

    p = verb("predict", _predict, "write a task's logits and predictions for a data file")
    p.add_argument("workspace")
    p.add_argument("--task", help="the task (or --all)")
    p.add_argument("--all", action="store_true",
                   help="every task in one pass, each column computed once per batch")
    p.add_argument("--data", required=True, help=".npz or .csv; labels optional")
    p.add_argument("-o", "--output", required=True, help="output .npz")
    p = verb("seal", _seal, "seal a task: record digests of its closure and its outputs on a "
                            "probe set")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--probe", required=True, help="labelled probe data (.npz or .csv)")
    p.add_argument("--device", default="cpu", help="where the reference is computed: cpu "
                                                   "(default) or cuda")

    p = verb("check", _check, "check every seal: same closure, same probe outputs, bit for bit")
    p.add_argument("workspace")
    p.add_argument("--task", help="check only this task")
    p.add_argument("--tolerance", type=_non_negative_float,
                   help="accept logits within this absolute difference (for other hardware)")
    p.add_argument("--probe", help="with --task: read the probe from this file instead")
    p.add_argument("--json", action="store_true")

    p = verb("unseal", _unseal, "lift a task's seal, with a reason kept in the history")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--reason", required=True, help="why the certificate is lifted")
    p = verb("export", _export, "write one task alone (its closure only) as a torch .pt "
                                "or an ONNX file")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("-o", "--output", required=True,
                   help="FILE.pt (loads with torch.load(weights_only=True) and "
                        "colonnade/standalone.py) or FILE.onnx")
    p = verb("cost", _cost, "what each task costs (parameters, bytes, MACs, activation "
                            "memory, latency), projected growth and a device verdict")
    p.add_argument("workspace")
    p.add_argument("--json", action="store_true", help="print the ledger as JSON")
    p.add_argument("--project", type=_positive_int, metavar="N",
                   help="also project N future tasks grown by the spec's rule")
    p.add_argument("--width", type=_positive_float, metavar="F",
                   help="with --project: the width factor of future columns (default: the "
                        "newest column's)")
    p.add_argument("--classes", type=_class_count, metavar="N",
                   help="with --project: classes of each future task (default: the newest "
                        "task's)")
    p.add_argument("--hardware", metavar="PROFILE",
                   help="a hardware profile YAML, or a name in specs/hardware/")
    _latency_flags(p)

    p = verb("report", _report, "write report.md, a self-contained report.html and "
                                "report.json with plots")
    p.add_argument("workspace")
    p.add_argument("-o", "--output", required=True, help="folder for the report files")
    p.add_argument("--hardware", metavar="PROFILE",
                   help="a hardware profile YAML, or a name in specs/hardware/")
    p.add_argument("--project", type=_positive_int, default=10, metavar="N",
                   help="future tasks to project (default 10)")
    _latency_flags(p)

    p = verb("draw", _draw, "draw the grown network for a design review (.svg, .png, .pdf, "
                            "or .dot source)")
    p.add_argument("workspace")
    p.add_argument("-o", "--output", required=True,
                   help="FILE.svg, FILE.png or FILE.pdf (rendered by graphviz's dot), or "
                        "FILE.dot (the source)")
    p.add_argument("--task", help="highlight this task's closure and fade the rest")
    p.add_argument("--compact", action="store_true",
                   help="one box per column, the adapters between each pair of columns "
                        "bundled into one labelled box (for many tasks)")
    p.add_argument("--direction", choices=["BT", "TB", "LR", "RL"], default="BT",
                   type=str.upper, help="where data flows: BT bottom to top (default), TB "
                                        "top to bottom, LR left to right, RL right to left")
    p.add_argument("--show-pruned", action="store_true",
                   help="draw pruned and merged adapters dotted and faint (default: hidden)")
    p = verb("usage", _usage, "score how much each lateral adapter feeding a task is used")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--data", required=True, help="labelled task data (.npz or .csv)")
    p.add_argument("--json", action="store_true")
    p.add_argument("--plot", metavar="FILE", help="heat map of source column against layer "
                                                  "(.png, .svg or .pdf)")
    p.add_argument("--noise", type=_positive_float, default=1.0,
                   help="perturbation noise, in standard deviations of each input feature")
    p.add_argument("--repeats", type=_positive_int, default=3,
                   help="noise draws averaged per adapter")

    p = verb("trim", _trim, "prune (and merge) low-use adapters of an unsealed task within a "
                            "tolerance")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--data", required=True, help="labelled data the accuracy is checked on")
    p.add_argument("--max-drop", type=_non_negative_float, default=0.5, metavar="POINTS",
                   help="accuracy points the task may lose on --data (default 0.5)")
    group = p.add_mutually_exclusive_group()
    group.add_argument("--target-params", type=_non_negative_int, metavar="N",
                       help="stop once the task's path has at most N parameters")
    group.add_argument("--target-macs", type=_non_negative_int, metavar="N",
                       help="stop once the task's path needs at most N MACs")
    p.add_argument("--finetune", type=_positive_int, metavar="EPOCHS",
                   help="fine-tune the task's own parts for EPOCHS after a removal that "
                        "needs it (needs --train)")
    p.add_argument("--train", help="the task's training data, for --finetune")
    p.add_argument("--merge", action="store_true",
                   help="then fold each layer's remaining adapters into one joint low-rank "
                        "adapter")
    p.add_argument("--json", action="store_true")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.run(args)
    except ColonnadeError as exc:
        print(f"colonnade: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("colonnade: interrupted; the workspace is unchanged", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (``colonnade show --json | head``): stop quietly, as the
        # Python documentation on SIGPIPE advises, without a traceback at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except OSError as exc:
        # The file system said no (a folder that cannot be made, a full disk): one sentence.
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"colonnade: error: {where}{exc.strerror or exc}; the workspace is unchanged",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
