"""A seal's probe, kept inside the workspace as exactly the samples the seal ran on.

Whatever the probe was (an .npz, a CSV, a class folder of images or audio, a .npy with a
labels file, arrays in memory), ``seal`` keeps one file: an uncompressed ``.npz`` holding
``x`` (the decoded samples, float32, as the network read them) and ``y`` (the class
indices, int64). Its name is its own SHA-256 (``probe-<sha256>.npz``), so the same probe
sealed twice is kept once, and the seal entry records that digest. ``check`` reads the
bytes the store already loaded (``net.kept_files``), compares them with the recorded
digest and unpacks them here; no path written in the manifest is ever opened.

Why the decoded samples and not the original files: the reference logits are a function
of the decoded tensor, so keeping that tensor makes the check independent of every
decoder (image and audio libraries, the CSV parser, resampling) that may change between
the seal and the check, and gives one reader for every kind of probe. The original
source's digest (``probe.sha256``) and path stay in the entry for information, and
``check --probe FILE`` still compares a file the user names against that digest.

One limit: the store reads every file of a workspace into memory when it opens it, so
a probe whose decoded samples exceed ``KEEP_LIMIT_BYTES`` is not kept (a probe larger
than memory can still be sealed, read in batches); its seal pins the source by digest,
says why nothing was kept, and ``check --probe FILE`` checks it.

The bytes are written deterministically (fixed member order, fixed timestamps, no
compression), so the same samples always give the same file and name. Reading checks
every size against the bytes at hand before anything is allocated (a kept file comes
with the workspace, from anyone).
"""

from __future__ import annotations

import hashlib
import io
import zipfile
from collections.abc import Sequence

import numpy as np
import torch

from ..errors import DataError
from ..training.datasets import Rows, materialize

__all__ = ["KEPT_FORMAT", "KEEP_LIMIT_BYTES", "pack_probe", "unpack_probe", "kept_name",
           "short_name", "too_large_to_keep"]

KEPT_FORMAT = "colonnade-probe-1"  # recorded in the seal entry beside the kept file
# A policy choice, not a measured figure: the store holds every workspace file in memory
# while the workspace is open, so a kept probe costs its size at every open.
KEEP_LIMIT_BYTES = 256 << 20
_MEMBERS = (("x", "<f4"), ("y", "<i8"))
_EPOCH = (1980, 1, 1, 0, 0, 0)  # the earliest time a zip entry can carry: no clock in it


def kept_name(data: bytes) -> str:
    """The workspace file a kept probe is stored as: named by its own SHA-256."""
    return f"probe-{hashlib.sha256(data).hexdigest()}.npz"


def short_name(name: str, digits: int = 12) -> str:
    """``probe-<first 12 hex>….npz``: how tables show a kept probe's name."""
    stem, dot, ext = name.partition(".")
    if stem.startswith("probe-") and len(stem) > 6 + digits:
        return f"{stem[:6 + digits]}\u2026{dot}{ext}"
    return name


def too_large_to_keep(x: torch.Tensor | Rows) -> str | None:
    """Why the samples ``x`` are not kept in the workspace, or None when they are."""
    size = 4 * int(x.shape[0]) * int(np.prod(tuple(x.shape[1:]), dtype=np.int64))
    if size <= KEEP_LIMIT_BYTES:
        return None
    return (f"its {int(x.shape[0])} samples take {size / (1 << 20):.0f} MiB decoded, more "
            f"than the {KEEP_LIMIT_BYTES >> 20} MiB a workspace keeps")


def pack_probe(x: torch.Tensor | Rows, y: torch.Tensor) -> bytes:
    """The probe's samples and labels as one deterministic, uncompressed .npz."""
    arrays = {"x": np.ascontiguousarray(materialize(x).detach().cpu().numpy(), dtype="<f4"),
              "y": np.ascontiguousarray(y.detach().cpu().numpy(), dtype="<i8")}
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_STORED, allowZip64=True) as archive:
        for key, _ in _MEMBERS:
            info = zipfile.ZipInfo(f"{key}.npy", date_time=_EPOCH)
            info.compress_type = zipfile.ZIP_STORED
            info.external_attr = 0o644 << 16
            with archive.open(info, "w", force_zip64=True) as member:
                np.lib.format.write_array(member, arrays[key], allow_pickle=False)
    return out.getvalue()


def _member(archive: zipfile.ZipFile, key: str, dtype: str, where: str) -> np.ndarray:
    """One array of the archive, its header checked against its stored size first."""
    name = f"{key}.npy"
    try:
        info = archive.getinfo(name)
    except KeyError:
        raise DataError(f"{where}: holds no array {key!r}") from None
    if info.compress_type != zipfile.ZIP_STORED or info.file_size != info.compress_size:
        raise DataError(f"{where}: array {key!r} is compressed, which colonnade never writes")
    with archive.open(info) as f:
        version = np.lib.format.read_magic(f)
        reader = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                  else np.lib.format.read_array_header_2_0)
        shape, fortran, found = reader(f, max_header_size=10_000)
        if found != np.dtype(dtype) or fortran:
            raise DataError(f"{where}: array {key!r} is {found}, not {np.dtype(dtype)} in C "
                            f"order")
        body = info.file_size - f.tell()
        count = 1
        for n in shape:
            count *= int(n)
        if body != count * np.dtype(dtype).itemsize:
            raise DataError(f"{where}: array {key!r} claims shape {list(shape)}, which does "
                            f"not fit its {body} bytes")
        data = bytearray(f.read(body))
    return np.frombuffer(data, dtype=dtype).reshape(shape).astype(dtype[1:], copy=False)


def unpack_probe(data: bytes, input_shape: Sequence[int], classes: int, where: str,
                 ) -> tuple[torch.Tensor, torch.Tensor]:
    """The samples and labels of a kept probe, checked against the task they probe."""
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            if sorted(archive.namelist()) != [f"{k}.npy" for k, _ in _MEMBERS]:
                raise DataError(f"{where}: is not a probe colonnade kept (its arrays are "
                                f"{', '.join(archive.namelist()) or 'none'})")
            x, y = (_member(archive, key, dtype, where) for key, dtype in _MEMBERS)
    except (zipfile.BadZipFile, ValueError, EOFError, OSError) as exc:
        raise DataError(f"{where}: cannot be read as a kept probe "
                        f"({exc.__class__.__name__})") from None
    if x.ndim < 1 or tuple(x.shape[1:]) != tuple(input_shape) or x.shape[0] == 0:
        raise DataError(f"{where}: holds samples of shape {list(x.shape)}, not rows of the "
                        f"network's input {list(input_shape)}")
    if y.shape != (x.shape[0],):
        raise DataError(f"{where}: holds {x.shape[0]} samples but labels of shape "
                        f"{list(y.shape)}")
    if y.size and (int(y.min()) < 0 or int(y.max()) >= classes):
        raise DataError(f"{where}: holds labels outside 0..{classes - 1}, the task's classes")
    return torch.from_numpy(x), torch.from_numpy(y)
