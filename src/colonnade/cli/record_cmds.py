"""The ``record`` verb: start the record of a workspace made before the record existed."""

from __future__ import annotations

import argparse
from typing import Any

from .record_options import add_record_options

__all__ = ["add_parsers"]


def _record(args: argparse.Namespace) -> int:
    from ..app.record import start_record

    entry = start_record(args.workspace, args.reason, by=args.by, sign=args.sign)
    n = entry["unchained_entries"]
    print(f"started the record of {args.workspace}: {n} earlier history "
          f"entr{'y' if n == 1 else 'ies'} chained as found, and an entry saying they were "
          f"not chained when written; check it with 'colonnade check {args.workspace}'")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("record", _record, "start the record (the digest chain) of a workspace made "
                                "before colonnade kept one: 'record start WS --reason TEXT'")
    p.add_argument("action", choices=["start"],
                   help="start: chain the existing history as found, saying so in the record")
    p.add_argument("workspace")
    p.add_argument("--reason", required=True,
                   help="why the earlier history is taken as it is, kept in the record")
    add_record_options(p, with_reason=False)
