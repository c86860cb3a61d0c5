"""Staging folders of ``grow --nproc`` inside a workspace, and their removal once stale.

A data-parallel grow lets its rank 0 write the trained network into a staging folder
inside the workspace (``.colonnade-ddp-<pid>-<random>``, never read as part of it), and
the launching process commits from there. The launcher makes that folder only while it
holds the workspace's writer lock, and removes it before it lets the lock go. The lock is
a ``flock`` that the kernel releases when its holder dies (``files.lock``), so whoever
holds the writer lock knows that no staging folder it finds belongs to a live run: the
run that made it was killed. That is how ownership is known, and why no pid is
compared: a pid is reused, a held lock is not.

So every writer sweeps them as soon as it takes the lock (``files.lock.writer_lock``),
and ``colonnade recover`` says what it removed. The sweep removes real folders only,
through ``shutil.rmtree``'s descriptor-based walk, which never follows a symbolic link
(Python's ``rmtree.avoids_symlink_attacks``); an entry of that name that is a file, a
link or a FIFO was not made by colonnade and is left where it is, and said so.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["STAGING_PREFIX", "Swept", "make_staging", "sweep_staging"]

STAGING_PREFIX = ".colonnade-ddp-"


@dataclass
class Swept:
    """What a sweep did: staging folders removed, and entries of that name left (why)."""

    removed: list[str] = field(default_factory=list)
    left: list[str] = field(default_factory=list)

    def describe(self) -> str | None:
        """One clause for a person, or None when there was nothing to sweep."""
        parts = []
        if self.removed:
            parts.append(f"removed {len(self.removed)} staging folder(s) left by a killed "
                         f"'grow --nproc': {', '.join(self.removed)}")
        if self.left:
            parts.append(f"left {', '.join(self.left)}")
        return "; ".join(parts) or None


def make_staging(folder: str | Path) -> Path:
    """A new, empty staging folder inside ``folder``; call it holding the writer lock."""
    return Path(tempfile.mkdtemp(prefix=f"{STAGING_PREFIX}{os.getpid()}-", dir=folder))


def sweep_staging(folder: str | Path) -> Swept:
    """Remove every staging folder in ``folder``: call it holding the writer lock only.

    Never raises for what it finds: an entry it cannot remove is reported in ``left``.
    """
    swept = Swept()
    try:
        entries = [e for e in os.scandir(folder) if e.name.startswith(STAGING_PREFIX)]
    except OSError:
        return swept  # the writer that called us reports an unreadable folder itself
    for entry in sorted(entries, key=lambda e: e.name):
        name = entry.name
        try:
            real_folder = entry.is_dir(follow_symlinks=False)
        except OSError:
            real_folder = False
        if not real_folder:
            swept.left.append(f"{name} (not a folder colonnade made: a file, a link or a "
                              f"FIFO; remove it yourself if it is not yours)")
            continue
        if not shutil.rmtree.avoids_symlink_attacks:  # never on Linux; said, not risked
            swept.left.append(f"{name} (this system cannot remove a folder without "
                              f"following links; remove it yourself)")
            continue
        failed = _remove_tree(entry.path)
        if failed or os.path.lexists(entry.path):
            swept.left.append(f"{name} (could not be removed: {failed[0] if failed else ''})")
        else:
            swept.removed.append(name)
    return swept


def _remove_tree(path: str) -> list[str]:
    """``shutil.rmtree`` that collects its errors instead of raising (``onexc`` from
    Python 3.12 on, where ``onerror`` is deprecated)."""
    failed: list[str] = []
    if sys.version_info >= (3, 12):
        shutil.rmtree(path, onexc=lambda fn, where, exc: failed.append(str(exc)))
    else:
        shutil.rmtree(path, onerror=lambda fn, where, exc: failed.append(str(exc[1])))
    return failed
