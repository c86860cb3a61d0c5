"""The one place where a workspace is opened for a verb and committed.

Every verb that changes a workspace runs as one transaction: open the workspace, act
through the library layers, commit once at the end. A failure or Ctrl-C before the
commit leaves the folder exactly as it was, because nothing is written before it.
Readers open the workspace through ``read_workspace``. Keeping both here means that locking,
recovery and the record's bookkeeping have exactly one home.

The record's part: every commit extends the history chain with the entries the verb
added, attributed to ``by`` (default: login user and host), with ``reason``, and signed
with the key ``sign`` names (or the key file in ``COLONNADE_SIGN_KEY``). The key is read
when the transaction opens, so a wrong key or passphrase stops the verb before any work.
"""

from __future__ import annotations

import getpass
import os
import sys
import warnings
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from contextvars import ContextVar
from dataclasses import dataclass
from pathlib import Path

from ..errors import UsageError
from ..evidence.record import (
    Attribution,
    describe_entry,
    record_never_started,
    signature_required_from,
)
from ..evidence.signing import Signer, load_signer
from ..files.commit import clear_interrupted_creation, interrupted_creation, read_pending
from ..files.lock import DEFAULT_WAIT, writer_lock
from ..files.manifest import MANIFEST, read_manifest
from ..files.staging import Swept
from ..files.store import load, save
from ..model.network import ProgressiveNet

__all__ = ["Transaction", "read_workspace", "writing", "attribution", "signer_from",
           "lock_wait", "wait_seconds", "tell_waiting", "recover", "recovery", "Recovery",
           "SIGN_KEY_ENV",
           "PASSPHRASE_ENV", "WAIT_ENV"]

SIGN_KEY_ENV = "COLONNADE_SIGN_KEY"
PASSPHRASE_ENV = "COLONNADE_KEY_PASSPHRASE"
WAIT_ENV = "COLONNADE_WAIT"
_wait: ContextVar[float | None] = ContextVar("colonnade_lock_wait", default=None)


@contextmanager
def lock_wait(seconds: float | None) -> Iterator[None]:
    """How long writing verbs in this block wait for another writer (``--wait``)."""
    if seconds is not None and not seconds >= 0:
        raise UsageError("--wait needs a number of seconds, 0 or more")
    token = _wait.set(seconds)
    try:
        yield
    finally:
        _wait.reset(token)


def wait_seconds() -> float:
    """Seconds a writer waits for the lock: ``lock_wait``, else $COLONNADE_WAIT, else 5."""
    chosen = _wait.get()
    if chosen is not None:
        return chosen
    text = os.environ.get(WAIT_ENV)
    if text:
        try:
            value = float(text)
        except ValueError:
            raise UsageError(f"{WAIT_ENV}={text!r} is not a number of seconds") from None
        if value >= 0:
            return value
        raise UsageError(f"{WAIT_ENV} must be 0 or more seconds")
    return DEFAULT_WAIT


def tell_waiting(message: str) -> None:
    """Say, once, that a writer is waiting for the lock (printed by the CLI as one line)."""
    warnings.warn(message, stacklevel=2)


def _passphrase(path: str | Path) -> bytes | None:
    """The key's passphrase: from the environment, or asked on a terminal if the key wants one."""
    if PASSPHRASE_ENV in os.environ:
        return os.environ[PASSPHRASE_ENV].encode("utf-8")
    try:
        head = Path(path).read_bytes()[:64]
    except OSError:
        return None  # load_signer says what is wrong with the file
    if b"ENCRYPTED" in head and sys.stdin.isatty():
        return getpass.getpass(f"passphrase for {path}: ").encode("utf-8")
    return None


def signer_from(sign: str | Path | None) -> Signer | None:
    """The signing key named by ``sign``, else by ``COLONNADE_SIGN_KEY``, else none."""
    path = sign if sign is not None else os.environ.get(SIGN_KEY_ENV) or None
    if path is None:
        return None
    return load_signer(path, _passphrase(path))


def attribution(verb: str, by: str | None = None, reason: str | None = None,
                sign: str | Path | None = None) -> Attribution:
    """Who commits ``verb`` and why, with the signing key loaded (fails fast if wrong)."""
    if by is not None and not by.strip():
        raise UsageError("--by needs a name; leave it out to record the login user and host")
    return Attribution(verb=verb, by=by, reason=(reason or "").strip() or None,
                       signer=signer_from(sign))


class Transaction:
    """A workspace opened for one writing verb: ``net`` to change, committed once."""

    def __init__(self, folder: str | Path, verb: str, by: str | None = None,
                 reason: str | None = None, sign: str | Path | None = None) -> None:
        self.folder = Path(folder)
        self.verb = verb
        self.who = attribution(verb, by, reason, sign)  # a wrong key fails before the lock
        self._locked = ExitStack()
        self.net: ProgressiveNet | None = None
        self._discarded = False
        self.swept = Swept()  # staging folders of killed runs, removed on taking the lock

    def open(self) -> Transaction:
        """Take the writer lock, then read the workspace: nothing rests on a stale read."""
        if not self.folder.is_dir():
            load(self.folder)  # says in one sentence what is wrong with the path
        self.swept = self._locked.enter_context(writer_lock(self.folder, self.verb,
                                                            wait_seconds(), tell_waiting))
        try:
            self.net = load(self.folder)
            self._require_signature()
        except BaseException:
            self._locked.close()
            raise
        return self

    def close(self) -> None:
        self._locked.close()

    @property
    def interrupted_write(self) -> bool:
        """Whether an interrupted commit waits to be recovered by this transaction."""
        return read_pending(self.folder) is not None

    @property
    def reason(self) -> str | None:
        return self.who.reason

    def _require_signature(self) -> None:
        history = self.net.meta.get("history")
        required = signature_required_from(history)
        if required is not None and self.who.signer is None:
            raise UsageError(f"{describe_entry(history[required - 1], required)} requires "
                             f"every later step to be signed; pass --sign KEY or set "
                             f"{SIGN_KEY_ENV}")

    def discard(self) -> None:
        """Leave the workspace as it was: the verb changed nothing worth committing."""
        self._discarded = True

    def commit(self) -> None:
        if not self._discarded and self.net is not None:
            save(self.net, self.folder, self.who)


@contextmanager
def writing(folder: str | Path, verb: str, by: str | None = None, reason: str | None = None,
            sign: str | Path | None = None) -> Iterator[Transaction]:
    """Open ``folder`` for ``verb``; commit when the block ends without an exception."""
    tx = Transaction(folder, verb, by, reason, sign).open()
    try:
        yield tx
        tx.commit()
    finally:
        tx.close()


@dataclass
class Recovery:
    """What ``recover`` did: the interrupted writes it found (None: there was none),
    whether that went into the history, and the staging folders of killed
    ``grow --nproc`` runs it swept (never recorded: they were not part of the workspace)."""

    found: str | None
    swept: Swept
    recorded: bool = True

    def describe(self) -> str | None:
        """Everything it did in one clause, or None when there was nothing to do."""
        parts = [p for p in (self.found, self.swept.describe()) if p]
        return "; ".join(parts) or None


CREATION_UNDONE = ("a 'new' or 'adopt' was interrupted before its commit point; what it "
                   "left was removed and the folder holds no workspace: run it again")


def recovery(folder: str | Path, by: str | None = None, reason: str | None = None,
             sign: str | Path | None = None) -> Recovery:
    """``colonnade recover WS``: finish or undo an interrupted write now, not at the next
    one (recorded in the history), and remove staging folders left by killed runs.

    A folder that an interrupted ``new`` or ``adopt`` left (no manifest yet) is emptied,
    with nothing to record it in. A workspace whose record was never started is refused
    in one sentence: ``record start`` chains it and records what it finds.
    """
    folder = Path(folder)
    if folder.is_dir() and not os.path.lexists(folder / MANIFEST):
        with writer_lock(folder, "recover", wait_seconds(), tell_waiting) as swept:
            leftovers = interrupted_creation(folder)
            if leftovers:
                clear_interrupted_creation(folder, leftovers)
                return Recovery(CREATION_UNDONE, swept, recorded=False)
    elif (folder / MANIFEST).is_file() and record_never_started(read_manifest(folder)):
        raise UsageError(f"{folder}: its record was never started, so nothing can be "
                         f"recorded in it; run 'colonnade record start {folder} --reason "
                         f"TEXT', which also records any interrupted write it finds")
    with writing(folder, "recover", by, reason, sign) as tx:
        if not tx.interrupted_write:
            tx.discard()
            return Recovery(None, tx.swept)
    found = tx.net.meta["history"][-1].get("found") if tx.net is not None else None
    return Recovery("; ".join(found) if isinstance(found, list) else "an interrupted write",
                    tx.swept)


def recover(folder: str | Path, by: str | None = None, reason: str | None = None,
            sign: str | Path | None = None) -> str | None:
    """``recovery`` in one clause: what was found and removed, or None if nothing was."""
    return recovery(folder, by, reason, sign).describe()


def read_workspace(folder: str | Path, strict: bool = True) -> ProgressiveNet:
    """Open ``folder`` to read: the whole committed workspace, in memory; nothing is written."""
    return load(folder, strict=strict)
