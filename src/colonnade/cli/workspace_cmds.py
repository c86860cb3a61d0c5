"""Verbs of the network itself: ``new``, ``grow``, ``show``, ``predict``."""

from __future__ import annotations

import argparse
from typing import Any

from .argtypes import (
    class_count,
    name_list,
    non_negative_float,
    non_negative_int,
    positive_float,
    positive_int,
)
from .output import metric, print_json, table
from .record_options import add_record_options, record_kwargs

__all__ = ["add_parsers"]


def _new(args: argparse.Namespace) -> int:
    from ..app.workspace import new_workspace

    net = new_workspace(args.spec, args.output, **record_kwargs(args))
    print(f"created workspace {args.output} from spec {net.spec.name!r} "
          f"(input {list(net.input_shape)}, {len(net.spec.column)} template layers, "
          f"lateral {net.spec.lateral.kind})")
    return 0


def _grow(args: argparse.Namespace) -> int:
    from ..app.workspace import grow_workspace

    entry = grow_workspace(args.workspace, args.task, args.train, val=args.val, mode=args.mode,
                           on=args.on, width=args.width, classes=args.classes,
                           epochs=args.epochs, device=args.device, progress=not args.quiet,
                           cache=False if args.no_cache else None, cache_mb=args.cache_mb,
                           target=args.target, nproc=args.nproc, labels=args.labels,
                           skip_bad=args.skip_bad, class_names=args.class_names,
                           workers=args.workers, **record_kwargs(args))
    if entry is None:  # a torchrun rank other than 0: rank 0 reports
        return 0
    what = (f"a column (column {entry['column']}, width {entry['width']:g})"
            if entry["step"] == "column_added" else f"a head on column {entry['column']}")
    print(f"grew task {entry['task']!r} as {what}: {entry['params_added']:,} new parameters, "
          f"validation accuracy {entry['val_accuracy']:.4f}")
    if "auto" in entry:
        print(f"auto: chose a {entry['auto']['chose']}: {entry['auto']['reason']}")
    _print_data_notes(entry.get("data") or {})
    return 0


def _print_data_notes(data: dict[str, Any]) -> None:
    """What loading the data did: conversions, resizing, files left out (--skip-bad)."""
    for note in data.get("notes", []):
        print(f"data: {note}")
    for line in data.get("skipped_files", []):
        print(f"  skipped {line}")
    if data.get("skipped", 0) > len(data.get("skipped_files", [])):
        print(f"  ... and {data['skipped'] - len(data['skipped_files'])} more")


def _show(args: argparse.Namespace) -> int:
    from ..app.show import describe

    info = describe(args.workspace)
    if args.json:
        print_json(info)
        return 0
    p = info["parameters"]
    print(f"workspace {info['workspace']}: spec {info['spec']!r}, input {info['input']}, "
          f"lateral {info['lateral']}")
    norm = info.get("normalization")
    if norm is not None:
        values = ("" if norm["mean"] is None else
                  f" mean {_numbers(norm['mean'])}, std {_numbers(norm['std'])}")
        print(f"input normalisation ({norm['from']}):{values}")
    if not info["tasks"]:
        print("no tasks yet; grow one with 'colonnade grow WS --task NAME --train FILE'")
    else:
        print()
        print(table([[t["task"] + (" (retired)" if t.get("state") == "retired" else ""),
                      t["mode"], t["column"], t["classes"], t["params_path"],
                      ",".join(map(str, t["closure_columns"])), t["val_accuracy"],
                      f"v{t['seal']}" if t.get("seal") else "-"]
                     for t in info["tasks"]],
                    ["task", "mode", "column", "classes", "params on path", "closure columns",
                     "val accuracy", "seal"]))
        named = [t for t in info["tasks"] if t.get("class_names")]
        if named:
            print()
            for t in named:
                print(f"classes of {t['task']}: {', '.join(t['class_names'])}")
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
    from ..app.workspace import predict_file

    result = predict_file(args.workspace, args.task, args.data, args.output,
                          all_tasks=args.all, labels=args.labels, skip_bad=args.skip_bad)
    if result["skipped"]:
        print(f"skipped {result['skipped']} bad file(s) (--skip-bad)")
    if args.all:
        print(f"wrote logits and predictions of {len(result['tasks'])} tasks "
              f"({', '.join(result['tasks'])}) for {result['samples']} samples to "
              f"{result['output']}")
        for name, acc in result["accuracy"].items():
            if acc is not None:
                print(f"  {name}: accuracy {acc:.4f}")
        if any(acc is None for acc in result["accuracy"].values()) and any(
                acc is not None for acc in result["accuracy"].values()):
            print("  (no accuracy for tasks whose classes the labels do not fit)")
        return 0
    msg = f"wrote logits and predictions of task {result['task']!r} for " \
          f"{result['samples']} samples to {result['output']}"
    if "accuracy" in result:
        msg += f"; accuracy {result['accuracy']:.4f}"
    print(msg)
    return 0


def _numbers(values: list[float]) -> str:
    return "[" + ", ".join(f"{v:.4g}" for v in values) + "]"


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
    sealed = "" if rec["BWT_sealed"] is None else f" (sealed tasks {metric(rec['BWT_sealed'])})"
    print(f"ACC {acc}   BWT {metric(rec['BWT'])}{sealed}   FWT {metric(rec['FWT'])}")


def _recover(args: argparse.Namespace) -> int:
    from ..app.transaction import recovery

    done = recovery(args.workspace, **record_kwargs(args))
    swept = done.swept.describe()
    if done.found is not None:
        print(f"{args.workspace}: recovered ({done.found})"
              f"{'; recorded in the history' if done.recorded else ''}")
    elif swept is None:
        print(f"{args.workspace}: no interrupted write to recover; nothing changed")
    else:
        print(f"{args.workspace}: no interrupted write to recover; nothing recorded")
    if swept is not None:
        print(f"{args.workspace}: {swept}")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("new", _new, "create a workspace from a spec")
    p.add_argument("spec", help="the YAML spec")
    p.add_argument("-o", "--output", required=True, help="the new workspace folder")
    add_record_options(p)

    p = verb("grow", _grow, "add a column or a head for a new task and train it")
    p.add_argument("workspace")
    p.add_argument("--task", required=True, help="name of the new task")
    p.add_argument("--train", required=True,
                   help="training data: .npz, .csv, a .npy of samples (with --labels), or a "
                        "folder with one subfolder per class (images, waveforms, .npy)")
    p.add_argument("--labels", metavar="LABELS.npy",
                   help="with a .npy of samples: its labels (integers or class names)")
    p.add_argument("--skip-bad", action="store_true",
                   help="leave unreadable or misshapen files of a folder out (listed, and "
                        "counted in the record) instead of refusing the data")
    p.add_argument("--class-names", type=name_list, metavar="A,B,C",
                   help="names of classes 0..C-1 for integer labels (or the order of named "
                        "classes)")
    p.add_argument("--workers", type=non_negative_int, default=0,
                   help="DataLoader worker processes reading streamed batches (default 0: "
                        "read in this process)")
    p.add_argument("--val", help="validation data; default: x_val/y_val in the file, "
                                 "else a stratified split")
    p.add_argument("--mode", choices=["column", "head", "auto"], default="column",
                   help="auto: a head if it reaches --target on validation data, else a "
                        "column")
    p.add_argument("--target", type=positive_float, metavar="ACCURACY",
                   help="with --mode auto: the validation accuracy (0-1) a head must reach")
    p.add_argument("--on", help="with --mode head or auto: the task whose column carries the "
                                "head (default: the newest column)")
    p.add_argument("--width", type=positive_float, default=1.0,
                   help="width factor of the new column against the template")
    p.add_argument("--classes", type=class_count, help="class count (default: from labels)")
    p.add_argument("--epochs", type=positive_int, help="override the spec's epochs")
    p.add_argument("--device", default="cpu", help="cpu (default) or cuda")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--nproc", type=positive_int,
                   help="train data-parallel with N local worker processes (torch.distributed: "
                        "gloo on cpu, nccl on cuda)")
    p.add_argument("--cache-mb", type=non_negative_float,
                   help="memory cap (MiB) for cached frozen-column outputs; beyond it they "
                        "spill to a temporary file (default: the spec's train.cache_mb)")
    p.add_argument("--no-cache", action="store_true",
                   help="recompute frozen columns every batch instead of caching them")
    add_record_options(p)

    p = verb("recover", _recover, "finish or undo a write that was interrupted (a crash, a "
             "kill) now and record it; the next writing verb would do it anyway")
    p.add_argument("workspace")
    add_record_options(p)

    p = verb("show", _show, "print tasks, columns, heads, adapters and parameter counts")
    p.add_argument("workspace")
    p.add_argument("--json", action="store_true")

    p = verb("predict", _predict, "write a task's logits and predictions for a data file")
    p.add_argument("workspace")
    p.add_argument("--task", help="the task (or --all)")
    p.add_argument("--all", action="store_true",
                   help="every task in one pass, each column computed once per batch")
    p.add_argument("--data", required=True,
                   help=".npz, .csv, .npy, or a folder (files, or class folders); labels "
                        "optional: with labels the accuracy is printed")
    p.add_argument("--labels", metavar="LABELS.npy", help="with a .npy of samples: its labels")
    p.add_argument("--skip-bad", action="store_true",
                   help="leave unreadable files of a folder out instead of refusing the data")
    p.add_argument("-o", "--output", required=True,
                   help="output .csv (one row per sample: id, predicted class, logits) or "
                        ".npz (arrays)")

