"""Verbs of a task's lifecycle: ``retrain`` and ``retire``."""

from __future__ import annotations

import argparse

from .argtypes import positive_int
from .record_options import add_record_options

__all__ = ["add_parsers"]


def _retrain(args: argparse.Namespace) -> int:
    from ..app.lifecycle import retrain_workspace

    step = retrain_workspace(args.workspace, args.task, args.train, args.reason, val=args.val,
                             epochs=args.epochs, fresh=args.fresh, progress=not args.quiet,
                             by=args.by, sign=args.sign)
    print(f"retrained task {step['task']!r} in place ({len(step['parts'])} parts"
          f"{', from fresh weights' if step['fresh'] else ''}): validation accuracy "
          f"{step['val_accuracy']:.4f}; reason recorded: {step['reason']}")
    return 0


def _retire(args: argparse.Namespace) -> int:
    from ..app.lifecycle import retire_workspace

    step = retire_workspace(args.workspace, args.task, args.reason, by=args.by, sign=args.sign)
    kept = (f"; parts still read by other tasks: {', '.join(step['parts_still_read'])}"
            if step["parts_still_read"] else "")
    print(f"retired task {step['task']!r}: no longer predicted, exported or costed; its "
          f"record stays{kept}; reason recorded: {step['reason']}")
    return 0


def add_parsers(verb) -> None:  # noqa: ANN001 (parser.build_parser's verb factory)
    p = verb("retrain", _retrain, "train an unsealed task's own parts again, in place, when "
                                  "no other task depends on them")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--train", required=True, help="training data (.npz or .csv)")
    p.add_argument("--val", help="validation data; default: as for grow")
    p.add_argument("--reason", required=True, help="why the task is retrained (kept in the "
                                                   "history)")
    p.add_argument("--epochs", type=positive_int, help="override the spec's epochs")
    p.add_argument("--fresh", action="store_true",
                   help="re-initialise the task's own parts first (default: continue from "
                        "the current weights)")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    add_record_options(p, with_reason=False)

    p = verb("retire", _retire, "take a task out of service (no longer predicted, exported "
                                "or costed), keeping its record")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--reason", required=True, help="why the task is retired (kept in the "
                                                   "history)")
    add_record_options(p, with_reason=False)
