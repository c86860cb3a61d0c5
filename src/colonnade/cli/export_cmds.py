"""The ``export`` verb: one task, some tasks or all of them as one artifact."""

from __future__ import annotations

import argparse
from typing import Any

from .argtypes import non_negative_float
from .output import print_json, table
from .record_options import add_record_options, record_kwargs

__all__ = ["add_parsers"]


def _percent(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.2f} %"


def _diff(row: dict[str, Any]) -> str:
    if row["bit_identical"]:
        return "0 (bit-identical)"
    return f"{row['max_abs_diff']:.3g}"


def _export(args: argparse.Namespace) -> int:
    from ..app.export import export_artifact

    r = export_artifact(args.workspace, args.output, task=args.task, tasks=args.tasks,
                        all_tasks=args.all, int8=args.int8, calibrate=args.calibrate,
                        accept_drop=args.accept_drop, **record_kwargs(args))
    if args.json:
        print_json(r)
        return 0
    rt = r["runtime"]
    print(f"exported {len(r['tasks'])} task(s) to {r['output']} ({r['format']}, "
          f"{r['precision']}, {r['bytes']:,} bytes, SHA-256 {r['sha256'][:16]}...); recorded "
          f"in the workspace's history")
    if r["report"]:
        print(f"each task on its probe, workspace (torch) against the artifact ({rt['name']} "
              f"{rt['version']}, {rt['threads']} thread(s), batch {rt['batch']}):")
        print(table([[t, row["probe"]["source"], row["samples"],
                      _percent(row["workspace_accuracy"]), _percent(row["artifact_accuracy"]),
                      _percent(row["agreement"]), _diff(row)]
                     for t, row in r["report"].items()],
                    ["task", "probe", "samples", "workspace acc.", "artifact acc.",
                     "same class", "max |logit diff|"]))
    size = r["size"]
    if size is not None:
        print(f"file size {size['file_bytes']:,} B against the cost ledger's int8 weight "
              f"bytes {size['ledger_int8_bytes']:,} B ({size['difference']:+,} B): "
              f"{size['explained']}")
    for note in r["notes"]:
        print(f"note: {note}.")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("export", _export, "write tasks as one artifact (their joint closure only): a "
                                "torch .pt file or ONNX, float32 or int8; recorded in the "
                                "history")
    p.add_argument("workspace")
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--task", help="one task")
    which.add_argument("--tasks", help="several tasks, separated by commas: a,b")
    which.add_argument("--all", action="store_true", help="every task, each column once")
    p.add_argument("-o", "--output", required=True,
                   help="FILE.pt (loads with torch.load(weights_only=True) and "
                        "colonnade/files/standalone.py) or FILE.onnx")
    p.add_argument("--int8", action="store_true",
                   help="quantise to int8 (ONNX, onnxruntime static quantisation, QDQ)")
    p.add_argument("--calibrate", metavar="FILE|DIR",
                   help="with --int8: calibration samples (any data format: .npz, .csv, .npy, a "
                        "folder; labels not needed); default: the validation data kept in "
                        "the workspace")
    p.add_argument("--accept-drop", type=non_negative_float, default=1.0, metavar="POINTS",
                   help="with --int8: accuracy points a sealed task may lose (default 1.0)")
    p.add_argument("--json", action="store_true")
    add_record_options(p)
