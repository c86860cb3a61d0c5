"""One writer at a time, and readers that never see a half-collected generation.

Two advisory locks (``flock``) on files inside the workspace:

- ``.writer.lock``: held exclusively by the one process changing the workspace, for the
  whole verb (open, compute, commit), so nothing it commits rests on a stale read. The
  holder writes its pid, host, verb and start time into the file, so a second writer can
  say who it waits for. The kernel releases a flock when its process dies, however it
  dies, so a killed writer never leaves a stale lock behind.
- ``.reader.lock``: readers hold it shared while they read the manifest and the files it
  names; a writer takes it exclusively, without waiting, only to delete files an older
  generation named. If a reader holds it, the old files simply stay until a later commit.

Both files must be regular files of one name: one replaced by a FIFO would make ``open``
wait for a process that never comes, so they are opened without blocking and refused
otherwise; a hard link would have the holder's note written into (and then emptied from)
whatever file it shares.

The writer lock is held per thread: a second thread of the same process that saves to the
workspace waits for the first, as a second process would (a flock conflicts between two
opens of the file even within one process). A child forked while the lock is held (a
DataLoader worker) closes its copy at once, so the lock never outlives the process that
took it; the parent's copy keeps it held.

``flock`` works on local file systems of Linux and macOS; on network file systems its
meaning depends on the server, which the README says.
"""

from __future__ import annotations

import errno
import fcntl
import os
import socket
import stat
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

from ..clock import now
from ..errors import BusyError, WorkspaceError
from .staging import Swept, sweep_staging

__all__ = ["WRITER_LOCK", "READER_LOCK", "writer_lock", "reader_lock", "try_collect_lock",
           "holds_writer_lock", "DEFAULT_WAIT"]

WRITER_LOCK = ".writer.lock"
READER_LOCK = ".reader.lock"
DEFAULT_WAIT = 5.0  # seconds a second writer waits before it gives up (--wait changes it)
# Seconds a reader waits for the reader lock. A writer holds it only while it unlinks the
# files of an older generation (milliseconds), so a wait this long means it is stuck.
READER_WAIT = 10.0
_POLL = 0.1
# Lock files are opened without following a symbolic link: a workspace from someone else
# could otherwise point one at a file of the user's, which the holder's note overwrites.
# O_NONBLOCK: a FIFO put in a lock file's place is not waited on (and then refused).
_OPEN = os.O_CLOEXEC | os.O_NOFOLLOW | os.O_NONBLOCK

# Writer locks held, by real path and thread, with how often each is entered and its
# descriptor: a verb holding the lock may call the store's save, which takes it again
# (re-entrant within one thread, never across two threads or two processes).
_held: dict[tuple[str, int], list[int]] = {}


def _key(folder: Path) -> tuple[str, int]:
    return os.path.realpath(folder), threading.get_ident()


def holds_writer_lock(folder: str | Path) -> bool:
    """Whether this thread already holds the writer lock of ``folder``."""
    return _key(Path(folder)) in _held


def _forget_in_child() -> None:
    """In a forked child: close the inherited lock descriptors, so that the lock is the
    parent's alone and goes when the parent goes (a flock lasts while any copy is open)."""
    for _, fd in _held.values():
        try:
            os.close(fd)
        except OSError:
            pass
    _held.clear()


os.register_at_fork(after_in_child=_forget_in_child)


def _open_lock(path: Path, flags: int) -> int:
    """Open a lock file, refusing anything but a regular file of one name (OSError as
    ``os.open``): the holder's note is written into the writer lock and emptied at the end,
    so a hard link to a file of the user's (a workspace unpacked from someone's archive)
    would empty that file."""
    fd = os.open(path, _OPEN | flags, 0o666)
    info = os.fstat(fd)
    if not stat.S_ISREG(info.st_mode) or info.st_nlink > 1:
        os.close(fd)
        raise OSError(errno.EINVAL if info.st_nlink <= 1 else errno.EMLINK,
                      "not a regular file of its own", str(path))
    return fd


def _holder(fd: int) -> str:
    """Who holds the lock, as its holder wrote it: 'pid 123 on host h (grow since ...)'."""
    try:
        text = os.pread(fd, 512, 0).decode("utf-8", "replace").strip()
    except OSError:
        text = ""
    return text or "another process"


def _flock_within(fd: int, mode: int, seconds: float,
                  waiting: Callable[[], None] | None = None) -> bool:
    """Take ``flock(fd, mode)``, trying every ``_POLL`` seconds for up to ``seconds``
    (never blocking in the kernel, so Ctrl-C and the deadline always get through);
    whether it was taken. ``waiting`` is called after each try that found it held."""
    deadline = time.monotonic() + seconds
    while True:
        try:
            fcntl.flock(fd, mode | fcntl.LOCK_NB)
            return True
        except OSError as exc:
            if exc.errno not in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                raise
        if time.monotonic() >= deadline:
            return False
        if waiting is not None:
            waiting()
        time.sleep(_POLL)


@contextmanager
def writer_lock(folder: str | Path, verb: str, wait: float | None = None,
                on_wait: Callable[[str], None] | None = None) -> Iterator[Swept]:
    """Hold ``folder``'s writer lock for the block; BusyError (exit 3) after ``wait`` s.

    Taking it (not re-entering it) sweeps the staging folders a killed ``grow --nproc``
    left (``files.staging``): with the lock held, none can belong to a live run. The
    block gets what was swept (an empty ``Swept`` when re-entered).
    """
    folder = Path(folder)
    key = _key(folder)
    if key in _held:
        _held[key][0] += 1
        try:
            yield Swept()
        finally:
            if key in _held:
                _held[key][0] -= 1
        return
    wait = DEFAULT_WAIT if wait is None else max(0.0, float(wait))
    try:
        fd = _open_lock(folder / WRITER_LOCK, os.O_RDWR | os.O_CREAT)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise WorkspaceError(f"{folder / WRITER_LOCK}: is a symbolic link, which "
                                 f"colonnade never makes; remove it") from None
        if exc.errno == errno.EMLINK:
            raise WorkspaceError(f"{folder / WRITER_LOCK}: is a hard link to another file, "
                                 f"which colonnade never makes and would overwrite; remove "
                                 f"it") from None
        if exc.errno in (errno.EINVAL, errno.EISDIR):
            raise WorkspaceError(f"{folder / WRITER_LOCK}: is not a regular file (a folder "
                                 f"or a FIFO), which colonnade never makes; remove it") from None
        raise WorkspaceError(f"{folder}: cannot open its writer lock ({exc.strerror}); a "
                             f"workspace can only be changed where you may write") from None
    try:
        told: list[bool] = []

        def waiting() -> None:
            if not told and on_wait is not None:
                on_wait(f"{folder}: {_holder(fd)} holds the writer lock; waiting up to "
                        f"{wait:g} s")
                told.append(True)

        if not _flock_within(fd, fcntl.LOCK_EX, wait, waiting):
            raise BusyError(f"{folder}: busy, {_holder(fd)} holds its writer lock; try again "
                            f"when it is done, or wait longer with --wait SECONDS")
        stamp = f"pid {os.getpid()} on host {socket.gethostname()} ({verb} since {now()})"
        os.ftruncate(fd, 0)
        os.pwrite(fd, stamp.encode("utf-8"), 0)
        _held[key] = [1, fd]
        try:
            yield sweep_staging(folder)
        finally:
            if _held.pop(key, None) is None:
                fd = -1  # a forked child: its copy was closed at the fork, the lock is not its
            else:
                try:
                    os.ftruncate(fd, 0)
                except OSError:
                    pass
    finally:
        if fd >= 0:
            os.close(fd)  # closing the last descriptor releases the flock


@contextmanager
def reader_lock(folder: str | Path) -> Iterator[None]:
    """Hold ``folder``'s reader lock shared for the block, where the file can be opened.

    A workspace on read-only media, or one made before locks existed, has no lock file a
    reader may create; it is read without one (nobody can be writing it either way).

    A writer holds it exclusively only for the moments it deletes old files; anyone who
    may read the file can hold it too (flock needs no more than a descriptor opened for
    reading), or a writer stopped with Ctrl-Z may sit in that moment, so a reader waits
    ``READER_WAIT`` seconds at most and then stops with BusyError (exit 3), never for ever.
    """
    path = Path(folder) / READER_LOCK
    try:
        fd = _open_lock(path, os.O_RDONLY)
    except OSError:
        yield
        return
    try:
        if not _flock_within(fd, fcntl.LOCK_SH, READER_WAIT):
            raise BusyError(f"{folder}: busy, another process has held its reader lock "
                            f"({READER_LOCK}) for {READER_WAIT:g} s, so it cannot be read "
                            f"whole now (a write stopped while it removes old files?); "
                            f"try again when it is done")
        yield
    finally:
        os.close(fd)


@contextmanager
def try_collect_lock(folder: str | Path) -> Iterator[bool]:
    """The reader lock exclusively if no reader holds it now (True), else False at once."""
    try:
        fd = _open_lock(Path(folder) / READER_LOCK, os.O_RDWR | os.O_CREAT)
    except OSError:
        yield False
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            yield False
            return
        yield True
    finally:
        os.close(fd)
