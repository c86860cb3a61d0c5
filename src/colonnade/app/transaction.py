"""The one place where a workspace is opened for a verb and committed.

Every verb that changes a workspace runs as one transaction: open the workspace, act
through the library layers, commit once at the end. A failure or Ctrl-C before the
commit leaves the folder exactly as it was, because nothing is written before it.
Readers open the workspace through ``read_workspace``. Keeping both here means that locking,
recovery and the record's bookkeeping have exactly one home.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..files.store import load, save
from ..model.network import ProgressiveNet

__all__ = ["Transaction", "read_workspace", "writing"]


class Transaction:
    """A workspace opened for one writing verb: ``net`` to change, committed once."""

    def __init__(self, folder: str | Path, verb: str) -> None:
        self.folder = Path(folder)
        self.verb = verb
        self.net: ProgressiveNet = load(folder)
        self._discarded = False

    def discard(self) -> None:
        """Leave the workspace as it was: the verb changed nothing worth committing."""
        self._discarded = True

    def commit(self) -> None:
        if not self._discarded:
            save(self.net, self.folder)


@contextmanager
def writing(folder: str | Path, verb: str) -> Iterator[Transaction]:
    """Open ``folder`` for ``verb``; commit when the block ends without an exception."""
    tx = Transaction(folder, verb)
    yield tx
    tx.commit()


def read_workspace(folder: str | Path, strict: bool = True) -> ProgressiveNet:
    """Open ``folder`` to read: the whole committed workspace, in memory; nothing is written."""
    return load(folder, strict=strict)
