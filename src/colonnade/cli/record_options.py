"""The record's flags, shared by every verb that writes a workspace: who, why, signed by."""

from __future__ import annotations

import argparse
from typing import Any

from .argtypes import non_negative_float

__all__ = ["add_record_options", "add_wait_option", "record_kwargs"]


def add_wait_option(p: argparse.ArgumentParser) -> None:
    """``--wait SECONDS``: how long to wait while another process writes the workspace."""
    p.add_argument("--wait", type=non_negative_float, metavar="SECONDS",
                   help="if another colonnade process is writing this workspace, wait up to "
                        "this long for it (default 5, or COLONNADE_WAIT), then stop with exit "
                        "code 3")


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
    add_wait_option(p)


def record_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    return {"by": args.by, "reason": args.reason, "sign": args.sign}
