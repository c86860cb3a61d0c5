"""The ``adopt`` verb: an already certified model becomes column 0 of a new workspace."""

from __future__ import annotations

import argparse
from typing import Any

from .record_options import add_record_options, record_kwargs

__all__ = ["add_parsers"]


def _tap_list(text: str) -> list[str]:
    taps = [t.strip() for t in text.split(",")]
    if not all(taps):
        raise argparse.ArgumentTypeError(f"expected tap names separated by commas, got {text!r}")
    return taps


def _adopt(args: argparse.Namespace) -> int:
    from ..app.adopt import adopt_workspace

    result = adopt_workspace(args.model, args.output, args.task, args.taps, args.spec,
                             args.probe, seal=args.seal, **record_kwargs(args))
    record, proof = result["adopted"], result["proof"]
    print(f"adopted {args.model} ({record['format']}, run by {record['runtime']} "
          f"{record['runtime_version']}) as column 0 of {result['workspace']}, task "
          f"{result['task']!r} with {record['classes']} classes")
    outputs = result.get("outputs") or []
    if len(outputs) > 1:
        print(f"logits: the model's first output {outputs[0]!r}; its other outputs "
              f"({', '.join(repr(o) for o in outputs[1:])}) are not read")
    if record.get("sha256"):
        print(f"model file SHA-256 {record['sha256']}")
    print("taps: " + ", ".join(f"{t} {s}" for t, s in zip(record["taps"], record["tap_shapes"],
                                                          strict=True)))
    print(f"proof: logits on {proof['samples']} probe samples bit-identical to the model run "
          f"alone ({proof['runtime']}, batch {proof['batch_size']})")
    if result["seal"] is not None:
        print(f"sealed task {result['task']!r} as seal v{result['seal']} (a software "
              f"regression check, not a safety certification)")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("adopt", _adopt, "make an already certified model (.pt2 or .onnx) the frozen "
                              "column 0 of a new workspace, proven unchanged on a probe")
    p.add_argument("model", help="a torch.export program (.pt2) or an ONNX model (.onnx)")
    p.add_argument("-o", "--output", required=True, help="the new workspace folder")
    p.add_argument("--task", required=True, help="the name of the adopted model's task")
    p.add_argument("--taps", required=True, type=_tap_list,
                   help="comma-separated names the later columns read: submodule names for "
                        ".pt2, graph value names for .onnx")
    p.add_argument("--spec", required=True, help="the spec of the columns grown later; its "
                                                 "input must equal the model's")
    p.add_argument("--probe", required=True, help="labelled probe data (.npz or .csv) on which "
                                                  "the adoption is proven bit-identical")
    p.add_argument("--seal", action="store_true", help="also seal the adopted task on the probe")
    add_record_options(p)
