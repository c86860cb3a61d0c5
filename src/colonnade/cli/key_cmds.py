"""The ``key`` verb: make an Ed25519 key pair for signing the record."""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from typing import Any

from ..errors import UsageError

__all__ = ["add_parsers"]

PASSPHRASE_ENV = "COLONNADE_KEY_PASSPHRASE"


def _passphrase(args: argparse.Namespace) -> str | None:
    if not args.encrypt:
        return None
    if os.environ.get(PASSPHRASE_ENV):
        return os.environ[PASSPHRASE_ENV]
    if not sys.stdin.isatty():
        raise UsageError(f"--encrypt needs a passphrase: set {PASSPHRASE_ENV} or run from a "
                         f"terminal to be asked")
    first = getpass.getpass("passphrase for the new key: ")
    if not first or first != getpass.getpass("the same passphrase again: "):
        raise UsageError("the two passphrases were empty or differ; run 'colonnade key new' "
                         "again")
    return first


def _key(args: argparse.Namespace) -> int:
    from ..app.record import new_key

    made = new_key(args.output, _passphrase(args))
    print(f"wrote private key {made['key']} (mode 0600"
          f"{', passphrase-protected' if made['encrypted'] else ''}; keep it to yourself) "
          f"and public key {made['public']} (key id {made['key_id']}; give it to whoever "
          f"checks your workspaces)")
    return 0


def add_parsers(verb: Any) -> None:
    """Add this group's verbs through ``verb(name, handler, help)``."""
    p = verb("key", _key, "make an Ed25519 key pair to sign the record: 'key new -o NAME'")
    p.add_argument("action", choices=["new"], help="new: write NAME.key and NAME.pub")
    p.add_argument("-o", "--output", required=True, metavar="NAME",
                   help="writes NAME.key (private, mode 0600) and NAME.pub")
    p.add_argument("--encrypt", action="store_true",
                   help=f"protect the private key with a passphrase ({PASSPHRASE_ENV}, or "
                        f"asked on the terminal)")
