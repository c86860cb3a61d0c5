"""Verbs that measure and trim adapters: ``usage``, ``trim``."""

from __future__ import annotations

import argparse
from typing import Any

from .argtypes import (
    non_negative_float,
    non_negative_int,
    positive_float,
    positive_int,
)
from .output import print_json, table
from .record_options import add_record_options, record_kwargs

__all__ = ["add_parsers"]


def _usage(args: argparse.Namespace) -> int:
    from ..app.trim import usage_workspace

    r = usage_workspace(args.workspace, args.task, args.data, plot=args.plot, noise=args.noise,
                        repeats=args.repeats, **record_kwargs(args))
    if args.json:
        print_json(r)
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
    from ..app.trim import trim_workspace

    r = trim_workspace(args.workspace, args.task, args.data, max_drop=args.max_drop,
                       target_params=args.target_params, target_macs=args.target_macs,
                       finetune=args.finetune or 0, train=args.train, merge=args.merge,
                       progress=not args.quiet, **record_kwargs(args))
    if args.json:
        print_json(r)
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


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("usage", _usage, "score how much each lateral adapter feeding a task is used")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--data", required=True, help="labelled task data (.npz or .csv)")
    p.add_argument("--json", action="store_true")
    p.add_argument("--plot", metavar="FILE", help="heat map of source column against layer "
                                                  "(.png, .svg or .pdf)")
    p.add_argument("--noise", type=positive_float, default=1.0,
                   help="perturbation noise, in standard deviations of each input feature")
    p.add_argument("--repeats", type=positive_int, default=3,
                   help="noise draws averaged per adapter")
    add_record_options(p)

    p = verb("trim", _trim, "prune (and merge) low-use adapters of an unsealed task within a "
                            "tolerance")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--data", required=True, help="labelled data the accuracy is checked on")
    p.add_argument("--max-drop", type=non_negative_float, default=0.5, metavar="POINTS",
                   help="accuracy points the task may lose on --data (default 0.5)")
    group = p.add_mutually_exclusive_group()
    group.add_argument("--target-params", type=non_negative_int, metavar="N",
                       help="stop once the task's path has at most N parameters")
    group.add_argument("--target-macs", type=non_negative_int, metavar="N",
                       help="stop once the task's path needs at most N MACs")
    p.add_argument("--finetune", type=positive_int, metavar="EPOCHS",
                   help="fine-tune the task's own parts for EPOCHS after a removal that "
                        "needs it (needs --train)")
    p.add_argument("--train", help="the task's training data, for --finetune")
    p.add_argument("--merge", action="store_true",
                   help="then fold each layer's remaining adapters into one joint low-rank "
                        "adapter")
    p.add_argument("--json", action="store_true")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_record_options(p, reason="why the task is trimmed (required; kept in the history)")

