"""Verbs of the evidence: ``seal``, ``check``, ``unseal``."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import UsageError
from .argtypes import (
    non_negative_float,
)
from .output import print_json, table

__all__ = ["add_parsers"]


def _seal(args: argparse.Namespace) -> int:
    from ..app.evidence import seal_workspace

    entry = seal_workspace(args.workspace, args.task, args.probe, device=args.device,
                           labels=args.probe_labels)
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
    if args.artifact is not None:
        return _check_artifact(args)
    from ..app.evidence import check_workspace

    report = check_workspace(args.workspace, task=args.task, tolerance=args.tolerance,
                             probe=args.probe)
    if args.json:
        print_json(report.to_dict())
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


def _check_artifact(args: argparse.Namespace) -> int:
    from ..app.export import check_artifact

    if args.task is not None or args.probe is not None:
        raise UsageError("--artifact checks every task the file holds, on the probes "
                         "recorded at export; leave out --task and --probe")
    report = check_artifact(args.workspace, args.artifact, tolerance=args.tolerance)
    if args.json:
        print_json(report.to_dict())
        return 0 if report.passed else 1
    if report.tasks:
        print(table([[t.task, t.verdict, _diff(t.max_abs_diff), t.samples,
                      "-" if t.predictions_agree is None else ("yes" if t.predictions_agree
                                                               else "no")]
                     for t in report.tasks],
                    ["task", "verdict", "max |diff|", "samples", "classes agree"]))
    for t in report.tasks:
        for sentence in t.failures:
            print(f"{t.task}: {sentence}.")
    for sentence in report.notes:
        print(f"note: {sentence}.")
    n, exact = len(report.tasks), sum(t.verdict == "exact" for t in report.tasks)
    if not n:
        print("the artifact fails: it is not the file that was exported")
    elif exact == n:
        print(f"the artifact checks exact: all {n} task(s) bit-identical to the export")
    elif report.passed:
        print(f"the artifact passes: {exact} task(s) exact, {n - exact} within the tolerance")
    else:
        print(f"the artifact fails: {n - sum(t.passed for t in report.tasks)} of {n} task(s)")
    return 0 if report.passed else 1


def _unseal(args: argparse.Namespace) -> int:
    from ..app.evidence import unseal_workspace

    step = unseal_workspace(args.workspace, args.task, args.reason)
    print(f"unsealed task {step['task']!r} (seal v{step['version']}) at {step['time']}; "
          f"reason recorded: {step['reason']}")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("seal", _seal, "seal a task: record digests of its closure and its outputs on a "
                            "probe set")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--probe", required=True,
                   help="labelled probe data: .npz, .csv, a class folder, or a .npy of samples "
                        "with --probe-labels")
    p.add_argument("--probe-labels", metavar="LABELS.npy",
                   help="with a .npy probe: its labels")
    p.add_argument("--device", default="cpu", help="where the reference is computed: cpu "
                                                   "(default) or cuda")

    p = verb("check", _check, "check every seal: same closure, same probe outputs, bit for bit")
    p.add_argument("workspace")
    p.add_argument("--task", help="check only this task")
    p.add_argument("--tolerance", type=non_negative_float,
                   help="accept logits within this absolute difference (for other hardware)")
    p.add_argument("--probe", help="with --task: read the probe from this file instead")
    p.add_argument("--artifact", metavar="FILE",
                   help="check an exported artifact instead: its digest against the history, "
                        "its outputs on the recorded probes, in the recorded runtime")
    p.add_argument("--json", action="store_true")

    p = verb("unseal", _unseal, "lift a task's seal, with a reason kept in the history")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--reason", required=True, help="why the certificate is lifted")

