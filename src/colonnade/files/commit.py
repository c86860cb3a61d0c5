"""How a workspace changes: a new generation behind one pointer, whatever crashes.

A generation is a manifest and the data files it names. Data files are immutable and
content-addressed (``data/<stem>.<sha256>.<ext>``): a name never stands for two contents,
so writing a new generation never touches a file an older one needs. ``manifest.yaml`` is
the only pointer; switching it with one atomic rename is the commit point. The order:

1. ``.pending`` is written (fsynced): who is committing, the record head it starts from
   and the head it will make, and any earlier interrupted commit it carries on.
2. Each new data file is written under a temporary name in ``data/``, fsynced, renamed to
   its content address; then ``data/`` is fsynced. A file whose content is already stored
   (a seal does not change the weights) is not written again.
3. The new manifest is written to a temporary file, fsynced, and renamed over
   ``manifest.yaml`` (the commit point); the folder is fsynced.
4. Only then are files that no generation but the old one names deleted (when no reader
   holds the reader lock; otherwise a later commit collects them), and ``.pending`` goes.

A crash before step 3's rename leaves the old manifest, whose files are all untouched; a
crash after it leaves the new one, whose files were durable before it. A second crash,
during the next write, finds the same: the last committed generation is never touched
before a newer one is durable. The next writer sees ``.pending`` and records a
``recovered`` entry in the history saying what it found (see ``pending_recovery``). The
note may not be ours (a workspace from someone else), so it is read bounded: 1 MiB, at
most 16 interrupted writes carried one inside another, 80 characters a field.

Ctrl-C during steps 1 to 4 is held until the commit is finished, then raised as
``InterruptedAfterCommit``, so the user is told the truth: the change was committed.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import signal
import sys
import threading
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from ..clock import now
from ..errors import InterruptedAfterCommit, WorkspaceError
from .limits import confined, sha256_file
from .lock import READER_LOCK, WRITER_LOCK, try_collect_lock
from .manifest import MANIFEST

__all__ = ["DATA", "PENDING", "write_durably", "fsync_dir", "sha_hex", "stored_path",
           "legacy_path", "write_generation", "read_pending", "pending_recovery",
           "interrupted_creation", "clear_interrupted_creation", "write_new_durably"]

DATA = "data"
PENDING = ".pending"
_TMP_PREFIX = ".tmp-"
_SHA = re.compile(r"[0-9a-f]{64}")
_MAX_CARRIED = 16  # interrupted commits a note tells of, and the history entry describes
_UMASK = os.umask(0)
os.umask(_UMASK)


def stored_path(name: str, sha256: str) -> str:
    """Where a listed file's content lives: ``data/<stem>.<sha256><ext>``, or
    ``data/<name>`` when the name holds its own SHA-256 already (kept probes)."""
    if not isinstance(sha256, str) or not _SHA.fullmatch(sha256):
        raise WorkspaceError(f"the manifest's digest of {str(name)[:80]!r} is not a SHA-256; "
                             f"it was edited by hand, restore the workspace from a copy you "
                             f"trust")
    name = str(name)
    if not name or name.startswith(".") or any(c in name for c in "/\\\x00"):
        raise WorkspaceError(f"the manifest names the file {name[:80]!r}, which is not a plain "
                             f"name inside the workspace; it was edited by hand, restore the "
                             f"workspace from a copy you trust")
    if sha256 in name:  # named by its digest already (a kept probe): not twice
        return f"{DATA}/{name}"
    stem, dot, ext = name.partition(".")
    return f"{DATA}/{stem}.{sha256}{dot}{ext}"


def legacy_path(name: str) -> str:
    """Where workspaces written before content addresses kept a file: at the top level."""
    return str(name)


def fsync_dir(folder: Path) -> None:
    """Make a folder's entries (a rename, a new or deleted file) durable."""
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_fsynced(tmp: Path, data: bytes, mode: int) -> None:
    """Create ``tmp`` afresh, write ``data`` whole and fsync it: the first half of both
    durable writes below. One plain system call a step, so a crash test can stop at each.
    O_EXCL | O_NOFOLLOW: never write through a link someone placed in the folder. A
    failure after the file was created (a full disk) removes it."""
    if os.path.lexists(tmp):  # left by a crashed process that had the same pid
        os.unlink(tmp)
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC,
                 mode)
    try:
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
            os.fsync(fd)
        finally:
            os.close(fd)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_durably(folder: Path, final: str, data: bytes) -> None:
    """Write ``data`` to a fresh temporary file in ``folder``, fsync it, rename it to
    ``final``: a crash leaves the old ``final`` or the new one, never half. Every step is
    one plain system call, so a crash test can stop at each; a failure (not a crash)
    removes the temporary file."""
    tmp = folder / f"{_TMP_PREFIX}{os.getpid()}-{final}"
    _write_fsynced(tmp, data, 0o666 & ~_UMASK)
    try:
        os.replace(tmp, folder / final)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_new_durably(final: Path, data: bytes, mode: int = 0o666) -> None:
    """Write a file that must not exist yet, so that a crash leaves it whole or absent.

    Written to a temporary file beside it (``.<name>.<pid>.tmp``), fsynced, then hard
    linked to ``final``: link(2) never replaces a file, so one that appeared meanwhile is
    refused (FileExistsError), unlike a rename. Where the file system has no hard links,
    the temporary file is renamed instead after checking that ``final`` is absent.
    """
    tmp = final.with_name(f".{final.name}.{os.getpid()}.tmp")
    _write_fsynced(tmp, data, mode)
    try:
        try:
            os.link(tmp, final)
        except FileExistsError:
            raise
        except OSError:  # no hard links here (FAT, some network file systems)
            if os.path.lexists(final):
                raise FileExistsError(final) from None
            os.rename(tmp, final)
    finally:
        if os.path.lexists(tmp):
            os.unlink(tmp)
    fsync_dir(final.parent)


def read_pending(folder: Path) -> dict[str, Any] | None:
    """The ``.pending`` note of an interrupted commit, or None; unreadable counts as one."""
    path = folder / PENDING
    if not path.is_file():
        return None
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC | os.O_NONBLOCK)
        with os.fdopen(fd, "rb") as handle:
            note = json.loads(handle.read(1 << 20))
    except (OSError, ValueError, RecursionError):  # RecursionError: nested thousands deep
        return {"verb": "unknown", "unreadable": True}
    return _bounded(note) if isinstance(note, dict) else {"verb": "unknown", "unreadable": True}


def _bounded(note: Mapping[str, Any], depth: int = _MAX_CARRIED) -> dict[str, Any]:
    """``note`` with at most ``depth`` interrupted commits carried inside one another, so
    crash after crash (or a crafted note) never makes the note deeper than a reader can
    parse; older ones are dropped, and the history then says that there were more."""
    kept = dict(note)
    carried = kept.get("carries")
    if isinstance(carried, Mapping) and depth > 1:
        kept["carries"] = _bounded(carried, depth - 1)
    elif carried is not None:
        kept["carries"] = {"verb": "unknown", "unreadable": True, "more": True}
    return kept


def _field(note: Mapping[str, Any], key: str, default: str) -> str:
    """One field of a note for the history, cut short: the note may not be ours."""
    return str(note.get(key, default))[:80]


def _describe(note: Mapping[str, Any], chained: set[str]) -> str:
    who = f"{_field(note, 'verb', 'a write')} (pid {_field(note, 'pid', '?')} on " \
          f"{_field(note, 'host', '?')}, {_field(note, 'time', 'time unknown')})"
    if note.get("more"):
        return "earlier interrupted writes, not described one by one"
    if note.get("unreadable"):
        return "an interrupted write left an unreadable note; its partial files were removed"
    if isinstance(note.get("to_head"), str) and note["to_head"] in chained:
        return f"{who} had committed; the clean-up it did not finish was done"
    return f"{who} was interrupted before its commit point; its partial files were removed"


def pending_recovery(folder: Path, chained: set[str]) -> dict[str, Any] | None:
    """A ``recovered`` history entry for the interrupted commits ``.pending`` tells of.

    ``chained``: the entry digests of the record now in place. When it holds a note's
    ``to_head``, that commit had passed its commit point; otherwise it had not, and
    nothing it wrote is named by any manifest. Either way no committed task is lost.
    """
    note = read_pending(folder)
    if note is None:
        return None
    found, seen = [], note
    while isinstance(seen, Mapping) and len(found) < _MAX_CARRIED:
        found.append(_describe(seen, chained))
        seen = seen.get("carries")
    return {"step": "recovered", "time": now(), "found": found}


@contextmanager
def _signals_held() -> Iterator[list[int]]:
    """Hold SIGINT for the block and report whether one came (main thread only)."""
    got: list[int] = []
    if threading.current_thread() is not threading.main_thread():
        yield got
        return
    previous = signal.signal(signal.SIGINT, lambda signum, frame: got.append(signum))
    try:
        yield got
    finally:
        signal.signal(signal.SIGINT, previous)


def write_generation(folder: Path, files: Mapping[str, bytes], text: str,
                     note: dict[str, Any], retired: set[str]) -> None:
    """Commit ``files`` and the manifest ``text`` naming them; see the module docstring.

    ``retired``: top-level files of the older layout the current manifest names, deleted
    once the new generation is durable. A failure before the commit point removes what
    this call wrote and leaves the workspace as it was; after it, the commit stands.
    """
    data_dir = folder / DATA
    earlier = read_pending(folder)
    if earlier is not None:
        note = {**note, "carries": earlier}
    written: list[Path] = []
    committed = False
    with _signals_held() as interrupted:
        try:
            if data_dir.is_symlink() or (data_dir.exists() and not data_dir.is_dir()):
                raise WorkspaceError(f"{data_dir}: is not a folder of its own (a link or a "
                                     f"file), and a workspace's files must lie inside it; "
                                     f"replace it with the folder it stands for")
            if (folder / PENDING).is_dir() and not (folder / PENDING).is_symlink():
                raise WorkspaceError(f"{folder / PENDING}: is a folder, where colonnade keeps "
                                     f"the note of an interrupted write; remove it")
            write_durably(folder, PENDING, json.dumps(note).encode("utf-8"))
            if not data_dir.is_dir():
                os.mkdir(data_dir)
            fsync_dir(folder)
            for name, data in files.items():
                target = data_dir / Path(stored_path(name, sha_hex(data))).name
                if target.is_file() and not target.is_symlink() and _holds(target, data):
                    continue
                if target.is_dir() and not target.is_symlink():
                    raise WorkspaceError(f"{target}: is a folder where colonnade keeps a data "
                                         f"file, so nothing can be committed; remove it")
                write_durably(data_dir, target.name, data)
                written.append(target)
            fsync_dir(data_dir)
            write_durably(folder, MANIFEST, text.encode("utf-8"))
            committed = True
            fsync_dir(folder)  # the commit point is durable from here on
            _collect(folder, {stored_path(n, sha_hex(d)) for n, d in files.items()}, retired)
        except BaseException:
            if not committed:
                _undo(folder, written, earlier)
                raise
            if not isinstance(sys.exc_info()[1], OSError):
                raise  # after the commit point only a file-system hiccup is forgiven
    if interrupted:
        raise InterruptedAfterCommit()


def _undo(folder: Path, written: list[Path], earlier: Mapping[str, Any] | None) -> None:
    """Remove what a failed (not crashed) write made before its commit point."""
    try:
        for path in written:
            path.unlink(missing_ok=True)
        for entry in os.scandir(folder / DATA) if (folder / DATA).is_dir() else ():
            if entry.name.startswith(_TMP_PREFIX):
                os.unlink(entry.path)
        for entry in os.scandir(folder):
            if entry.name.startswith(_TMP_PREFIX):
                os.unlink(entry.path)
        if earlier is None:
            (folder / PENDING).unlink(missing_ok=True)
        else:  # an earlier interruption is still to be recorded by the next writer
            write_durably(folder, PENDING, json.dumps(earlier).encode("utf-8"))
    except OSError:
        pass  # what is left is collected by the next commit; the manifest never moved


def sha_hex(data: bytes) -> str:
    """The SHA-256 of ``data`` in hex: a file's content address."""
    return hashlib.sha256(data).hexdigest()


def _holds(path: Path, data: bytes) -> bool:
    """Whether the stored file already has exactly ``data`` (it may have been damaged)."""
    try:
        digest, size = sha256_file(path, len(data) + 1)
    except (OSError, WorkspaceError):
        return False
    return size == len(data) and digest == sha_hex(data)


_OWN = {MANIFEST, PENDING, WRITER_LOCK, READER_LOCK, DATA}


def _collect(folder: Path, keep: set[str], retired: set[str]) -> None:
    """Delete what only older generations name, then the ``.pending`` note.

    Skipped, and left to a later commit, while a reader holds the reader lock (the note
    goes all the same: the commit is whole, and an unnamed file is garbage to any later
    commit, note or not). Only files
    colonnade writes are deleted: ``data/`` entries no generation in place names, its own
    temporary files, and the older layout's top-level files (``retired``, ``*.prev``).
    """
    with try_collect_lock(folder) as free:
        if not free:  # the commit is whole: say so, and let a later commit collect
            os.unlink(folder / PENDING)
            fsync_dir(folder)
            return
        data_dir = folder / DATA
        for entry in os.scandir(data_dir):
            if f"{DATA}/{entry.name}" not in keep and (entry.is_symlink()
                                                       or entry.is_file(follow_symlinks=False)):
                os.unlink(entry.path)
        for entry in os.scandir(folder):
            name = entry.name
            ours = (name.startswith(_TMP_PREFIX) or name in retired
                    or (name.endswith(".prev") and name[:-5] in retired)
                    or (name.startswith(".") and name.endswith(".tmp")))
            if ours and name not in _OWN and entry.is_file(follow_symlinks=False):
                os.unlink(entry.path)
        fsync_dir(data_dir)
        os.unlink(folder / PENDING)
        fsync_dir(folder)


def interrupted_creation(folder: Path) -> list[Path] | None:
    """What a creation (``new``, ``adopt``) killed before its commit point left in
    ``folder``, in the order to remove it; None when the folder holds anything else.

    Before ``.pending`` is in place only this module's temporary files can be there; after
    it, a note saying it commits the first generation (no ``from_head``), ``data/`` with
    plain files, and temporary files. The lock files are not listed: they stay. A folder
    without a manifest whose note says otherwise (a workspace whose manifest was deleted)
    is not a creation's leftovers, and nothing in it is touched.
    """
    if os.path.lexists(folder / MANIFEST):
        return None
    note = read_pending(folder)
    creation = note is not None and not note.get("unreadable") and note.get("from_head") is None
    files: list[Path] = []
    folders: list[Path] = []
    for entry in os.scandir(folder):
        name = entry.name
        if name in (WRITER_LOCK, READER_LOCK):
            continue
        if entry.is_symlink():
            return None
        if name.startswith(_TMP_PREFIX) and entry.is_file(follow_symlinks=False):
            files.append(Path(entry.path))
        elif name == PENDING and creation and entry.is_file(follow_symlinks=False):
            continue  # removed last
        elif name == DATA and creation and entry.is_dir(follow_symlinks=False):
            inside = list(os.scandir(entry.path))
            if not all(e.is_file(follow_symlinks=False) for e in inside):
                return None
            files += [Path(e.path) for e in inside]
            folders.append(Path(entry.path))
        else:
            return None
    return files + folders + ([folder / PENDING] if creation else [])


def clear_interrupted_creation(folder: Path, leftovers: list[Path]) -> None:
    """Remove what ``interrupted_creation`` listed (under the writer lock), ``.pending``
    last, so a crash here leaves leftovers that are still recognised as such."""
    for path in leftovers:
        if path.is_dir() and not path.is_symlink():
            os.rmdir(path)
        else:
            path.unlink(missing_ok=True)
    fsync_dir(folder)


def confined_stored(folder: Path, name: str, entry: Any) -> tuple[Path, Path]:
    """The content-addressed path of a listed file and its older top-level path."""
    sha = entry.get("sha256") if isinstance(entry, Mapping) else None
    return confined(folder, stored_path(name, sha)), confined(folder, legacy_path(name))
