"""The command line: each verb parses its flags, calls one library function, and formats.

No logic lives here. Every expected failure is a ColonnadeError, printed as one sentence
with a non-zero exit code; Ctrl-C exits 130 and, because workspaces are only written at
the end of an action, leaves them as they were.
"""

from __future__ import annotations

import argparse
import json
import math
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
                           epochs=args.epochs, device=args.device, progress=not args.quiet)
    what = (f"a column (column {entry['column']}, width {entry['width']:g})"
            if entry["step"] == "column_added" else f"a head on column {entry['column']}")
    print(f"grew task {entry['task']!r} as {what}: {entry['params_added']:,} new parameters, "
          f"validation accuracy {entry['val_accuracy']:.4f}")
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
        print(table([[c["column"], c["task"], c["width"], c["params"]] for c in info["columns"]],
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

    result = predict_file(args.workspace, args.task, args.data, args.output)
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
    passed = sum(t.passed for t in report.tasks)
    if report.passed:
        print(f"all {passed} sealed task(s) pass")
    else:
        print(f"{len(report.tasks) - passed} of {len(report.tasks)} sealed task(s) fail")
    return 0 if report.passed else 1


def _unseal(args: argparse.Namespace) -> int:
    from .seal import unseal_workspace

    step = unseal_workspace(args.workspace, args.task, args.reason)
    print(f"unsealed task {step['task']!r} (seal v{step['version']}) at {step['time']}; "
          f"reason recorded: {step['reason']}")
    return 0


# ----------------------------------------------------------------------------- parser
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
    p.add_argument("--mode", choices=["column", "head"], default="column")
    p.add_argument("--on", help="with --mode head: the task whose column carries the head "
                                "(default: the newest column)")
    p.add_argument("--width", type=_positive_float, default=1.0,
                   help="width factor of the new column against the template")
    p.add_argument("--classes", type=_class_count, help="class count (default: from labels)")
    p.add_argument("--epochs", type=_positive_int, help="override the spec's epochs")
    p.add_argument("--device", default="cpu", help="cpu (default) or cuda")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    p = verb("show", _show, "print tasks, columns, heads, adapters and parameter counts")
    p.add_argument("workspace")
    p.add_argument("--json", action="store_true")

    p = verb("predict", _predict, "write a task's logits and predictions for a data file")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
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


if __name__ == "__main__":
    sys.exit(main())
