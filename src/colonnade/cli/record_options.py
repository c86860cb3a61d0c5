"""The record's flags, shared by every verb that writes a workspace: who, why, signed by."""

from __future__ import annotations

import argparse
from typing import Any

__all__ = ["add_record_options", "record_kwargs"]


def add_record_options(p: argparse.ArgumentParser, reason: str | None = None,
                       with_reason: bool = True) -> None:
    """``--by``, ``--reason`` (``reason`` is its help when the verb requires it) and ``--sign``."""
    group = p.add_argument_group("record")
    group.add_argument("--by", help="who takes this step (default: login user and host)")
    if with_reason:
        group.add_argument("--reason", help=reason or "why, kept in the history")
    group.add_argument("--sign", metavar="KEY",
                       help="sign the new history entries with this private key "
                            "(default: the key file in COLONNADE_SIGN_KEY, if set)")


def record_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    return {"by": args.by, "reason": args.reason, "sign": args.sign}
