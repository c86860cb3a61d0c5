"""The ``export`` verb."""

from __future__ import annotations

import argparse
from typing import Any

__all__ = ["add_parsers"]


def _export(args: argparse.Namespace) -> int:
    from ..app.export import export_task

    r = export_task(args.workspace, args.task, args.output)
    seal = f"seal v{r['seal']['version']}" if r["seal"] else "not sealed"
    print(f"exported task {r['task']!r} to {r['output']} ({r['format']}, {r['bytes']:,} bytes): "
          f"columns {','.join(map(str, r['columns']))}, {r['adapters']} adapters, "
          f"{r['parameters']:,} values in {r['tensors']} tensors; closure SHA-256 "
          f"{r['closure_sha256'][:16]}..., {seal}")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("export", _export, "write one task alone (its closure only) as a torch .pt "
                                "or an ONNX file")
    p.add_argument("workspace")
    p.add_argument("--task", required=True)
    p.add_argument("-o", "--output", required=True,
                   help="FILE.pt (loads with torch.load(weights_only=True) and "
                        "colonnade/standalone.py) or FILE.onnx")

