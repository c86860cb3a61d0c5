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

__all__ = ["confined", "sha256_file", "read_bounded", "CHUNK", "MAX_MANIFEST_BYTES",
           "MAX_MANIFEST_VALUES"]

CHUNK = 1 << 20  # hashing reads 1 MiB at a time, whatever the file's size
# The largest manifest colonnade reads. A manifest holds the spec, the network's layout,
# the history and the seals' digests: a few KiB per task, so a workspace of a thousand
# tasks stays far below this, while a file of this size still parses in seconds (a
# 28.5 MiB manifest took 30 s and 1.1 GB to read on this project's 2-core machine, so the
# bound is a quarter of that). Our own bound (the manifests colonnade writes measured a
# few KiB to a few hundred KiB).
MAX_MANIFEST_BYTES = 8 << 20
# The most values (YAML scalars, mappings and sequences) a manifest may hold. Manifests
# colonnade writes hold one value per 14 to 15 bytes (measured on a small workspace and on
# a 28.5 MiB one), so a manifest of MAX_MANIFEST_BYTES holds about 600,000; a file packed
# with two-byte values (``[1,1,1,...``) would hold 4 million, and building them would take
# gigabytes, so it is refused while it is scanned, before anything is built.
MAX_MANIFEST_VALUES = 1_000_000


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


def read_bounded(path: Path, limit: int, what: str) -> bytes:
    """A regular file's bytes, refused in one sentence when it holds more than ``limit``.

    The size is looked up before anything is read, and at most ``limit + 1`` bytes are
    read even if the file grows meanwhile, so a huge (or sparse, or endless) file costs
    no memory. ``what`` names the kind of file in the sentence.
    """
    try:
        info = os.stat(path)
    except OSError as exc:
        raise WorkspaceError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if not stat.S_ISREG(info.st_mode):
        raise WorkspaceError(f"{path}: not a regular file, so it cannot be {what}")
    if info.st_size > limit:
        raise WorkspaceError(f"{path}: {info.st_size:,} bytes, more than the {limit:,} bytes "
                             f"{what} may hold; it was not written by colonnade, restore it "
                             f"from a copy you trust")
    try:
        with open(path, "rb") as handle:
            data = handle.read(limit + 1)
    except OSError as exc:
        raise WorkspaceError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if len(data) > limit:
        raise WorkspaceError(f"{path}: grew past the {limit:,} bytes {what} may hold while "
                             f"it was read; stop whatever writes it and try again")
    return data
