"""Bounds on what a workspace may ask of the machine that opens it.

A workspace may come from anyone (a copy from a colleague, an archive from a supplier), so
nothing it names is trusted before it is checked: a path it names must resolve inside it,
and a file is hashed in bounded chunks, never read whole to learn its digest. Invariant 12
of the design: paths named by a workspace resolve inside it; sizes read from files are
checked before anything is allocated.
"""

from __future__ import annotations

import hashlib
import os
import stat
from pathlib import Path

from ..errors import WorkspaceError

__all__ = ["confined", "sha256_file", "CHUNK"]

CHUNK = 1 << 20  # hashing reads 1 MiB at a time, whatever the file's size


def confined(folder: Path, relative: str) -> Path:
    """``folder / relative``, refused in one sentence unless it stays inside ``folder``.

    Only plain relative names of at most two parts are accepted (``weights.safetensors``,
    ``data/weights.<sha>.safetensors``): no absolute paths, no ``..``, no empty parts, no
    backslashes or NUL bytes, and no symbolic link on the way out of the folder.
    """
    text = str(relative)
    parts = text.split("/")
    if (not text or text.startswith("/") or "\\" in text or "\x00" in text or len(parts) > 2
            or any(p in ("", ".", "..") for p in parts)):
        raise WorkspaceError(f"{folder}: the manifest names the file {text[:80]!r}, which is "
                             f"not a plain name inside the workspace; it was edited by hand, "
                             f"restore it from a copy you trust")
    path = folder / text
    if path.is_symlink() or (len(parts) == 2 and (folder / parts[0]).is_symlink()):
        raise WorkspaceError(f"{path}: is a symbolic link, and a workspace's files must lie "
                             f"inside it; replace the link with the file")
    return path


def sha256_file(path: Path, limit: int | None = None) -> tuple[str, int]:
    """The SHA-256 and size of a regular file, read in chunks of ``CHUNK`` bytes.

    ``limit``: stop after this many bytes (the size the manifest recorded, plus one), so
    a file that grew, or a sparse file that claims terabytes, costs no more than the file
    it should be. Anything but a regular file (a device, ``/proc``) is refused.
    """
    with open(path, "rb") as handle:
        if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
            raise WorkspaceError(f"{path}: not a regular file")
        digest, size = hashlib.sha256(), 0
        while limit is None or size < limit:
            chunk = handle.read(CHUNK if limit is None else min(CHUNK, limit - size))
            if not chunk:
                break
            digest.update(chunk)
            size += len(chunk)
    return digest.hexdigest(), size
