"""Verbs of the evidence: ``seal``, ``check``, ``unseal``."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import UsageError
from .argtypes import (
    non_negative_float,
)
from .output import print_json, table
from .record_options import add_record_options, record_kwargs

__all__ = ["add_parsers"]


def _seal(args: argparse.Namespace) -> int:
    from ..app.evidence import seal_workspace

    entry = seal_workspace(args.workspace, args.task, args.probe, device=args.device,
                           labels=args.probe_labels,
                           accept_low_accuracy=args.accept_low_accuracy,
                           require_signed=args.require_signed, **record_kwargs(args))
    for change in entry.get("changes") or []:
        print(f"against the previous seal: {change}")
    m, c = entry["metrics"], entry["closure"]
    print(f"sealed task {entry['task']!r} as seal v{entry['version']}: closure SHA-256 "
          f"{c['sha256'][:16]}... over {len(c['tensors'])} tensors, probe accuracy "
          f"{m['accuracy']:.4f} on {entry['probe']['samples']} samples")
    probe = entry["probe"]
    if probe.get("file"):
        print(f"the probe's samples are kept in the workspace as {probe['file']}")
    else:
        print(f"the probe is not kept in the workspace ({probe.get('not_kept')}); check this "
              f"seal with --task {entry['task']} --probe FILE")
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
                             probe=args.probe, trust=args.trust, data=args.data,
                             probe_labels=args.probe_labels)
    if args.json:
        print_json(report.to_dict())
        return 0 if report.passed else 1
    _print_record(report.record)
    if report.data is not None:
        d = report.data
        print(f"data: {d['file']} for task {d['task']!r}: {d['sentence']}")
    if not report.tasks:
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
    if report.record is not None and not report.record.passed:
        print(f"the record does not verify, so no verdict above can be trusted ({exact} of "
              f"{n} sealed task(s) check exact against it)")
    elif exact == n:
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


def _print_record(record: Any) -> None:
    """The record's verdict first: every finding but the first few only counted."""
    if record is None:
        return
    signed = sum(s.status in ("trusted", "valid", "untrusted") for s in record.signatures)
    trusted = sum(s.status == "trusted" for s in record.signatures)
    signatures = (f"{signed} signed" + (f", {trusted} by a trusted key" if record.trusted
                                        else ""))
    head = f"head {record.head[:16]}..." if record.head else "no head"
    if record.passed:
        print(f"record: {record.entries} entries, {head}, every entry, section and file "
              f"matches; {signatures}")
    else:
        print(f"record: does not verify ({record.entries} entries, {head}; {signatures})")
        for finding in record.findings[:5]:
            print(f"record: {finding.message}.")
        if len(record.findings) > 5:
            print(f"record: and {len(record.findings) - 5} more findings (see --json)")
    for note in record.notes:
        print(f"record: note: {note}.")


def _unseal(args: argparse.Namespace) -> int:
    from ..app.evidence import unseal_workspace

    step = unseal_workspace(args.workspace, args.task, args.reason, by=args.by,
                            sign=args.sign)
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
    p.add_argument("--accept-low-accuracy", action="store_true",
                   help="seal even when the probe accuracy is far below the task's "
                        "validation accuracy (normally a sign of the wrong probe file)")
    p.add_argument("--require-signed", action="store_true",
                   help="from this seal on, every step of the record must be signed")
    add_record_options(p, reason="why (required when the task was sealed before)")

    p = verb("check", _check, "check every seal: same closure, same probe outputs, bit for bit")
    p.add_argument("workspace")
    p.add_argument("--task", help="check only this task")
    p.add_argument("--tolerance", type=non_negative_float,
                   help="accept logits within this absolute difference (for other hardware)")
    p.add_argument("--probe", help="with --task: read the probe from this file instead of "
                                   "the copy the seal kept in the workspace")
    p.add_argument("--probe-labels", metavar="LABELS.npy",
                   help="with a .npy --probe: its labels")
    p.add_argument("--artifact", metavar="FILE",
                   help="check an exported artifact instead: its digest against the history, "
                        "its outputs on the recorded probes, in the recorded runtime")


    p.add_argument("--trust", action="append", metavar="KEY.pub",
                   help="a public key whose signatures you accept (repeatable); the chain "
                        "head must be signed by one of them")
    p.add_argument("--data", metavar="FILE",
                   help="with --task: say whether FILE is the data the task was trained on")
    p.add_argument("--json", action="store_true")

    p = verb("unseal", _unseal, "lift a task's seal, with a reason kept in the history")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("--reason", required=True, help="why the certificate is lifted")
    add_record_options(p, with_reason=False)

