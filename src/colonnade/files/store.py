"""Workspace read and write: ``manifest.yaml`` plus safetensors files, atomically.

The manifest is the commit point. Data files are written first under temporary names,
the files they replace are kept as ``NAME.prev`` hard links, the data files are renamed
into place, and only then the manifest, which records each file's SHA-256. A crash at
any point leaves either the old manifest with its old files (found again through
``.prev`` if they were already replaced) or the new ones, never a mix. Loading reads
YAML with the safe loader and tensors with safetensors: no code runs.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path
from typing import Any

import torch
from safetensors import SafetensorError
from safetensors.torch import load as st_load
from safetensors.torch import save as st_save

from .._version import __version__
from ..clock import now
from ..errors import ColonnadeError, WorkspaceError
from ..evidence.record import Attribution, extend, verify_chain
from ..model.adopted import ADOPTED_FILE, rebuild_adopted
from ..model.guard import verify_unchanged
from ..model.network import ProgressiveNet
from ..model.schema import Spec
from ..model.spec import load_spec, parse_spec
from .manifest import FORMAT, MANIFEST, RESERVED, VERSION, WEIGHTS, manifest_text, read_manifest
from .summary import network_summary

__all__ = ["create", "save", "load", "atomic_write", "read_manifest", "MANIFEST", "WEIGHTS"]



_UMASK = os.umask(0)
os.umask(_UMASK)


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _write_temp(folder: Path, name: str, data: bytes) -> Path:
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
    try:
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; give the usual file mode
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return Path(tmp)


def atomic_write(path: str | Path, data: bytes | str) -> None:
    """Write a file so that a crash leaves either the old content or the new, never half."""
    path = Path(path)
    if isinstance(data, str):
        data = data.encode("utf-8")
    tmp = _write_temp(path.parent, path.name, data)
    try:
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _commit(folder: Path, files: dict[str, bytes], manifest: dict[str, Any]) -> None:
    """Write data files, then the manifest that names them; see the module docstring."""
    for stale in folder.glob(".*.tmp"):  # left by a crash during an earlier write
        stale.unlink(missing_ok=True)
    temps: dict[str, Path] = {}
    try:
        for name, data in files.items():
            temps[name] = _write_temp(folder, name, data)
        text = manifest_text(manifest)
        manifest_tmp = _write_temp(folder, MANIFEST, text.encode("utf-8"))
        temps[MANIFEST] = manifest_tmp
        for name in files:
            target, prev = folder / name, folder / (name + ".prev")
            prev.unlink(missing_ok=True)
            if target.exists():
                os.link(target, prev)
        for name in files:
            os.replace(temps[name], folder / name)
            del temps[name]
        os.replace(temps[MANIFEST], folder / MANIFEST)
        del temps[MANIFEST]
        _fsync_dir(folder)
    finally:
        for tmp in temps.values():
            tmp.unlink(missing_ok=True)
    for name in files:
        (folder / (name + ".prev")).unlink(missing_ok=True)


def _tensor_files(net: ProgressiveNet) -> dict[str, bytes]:
    state = {k: v.detach().cpu().contiguous() for k, v in net.state_dict().items()}
    files = {WEIGHTS: st_save(state, metadata={"format": FORMAT})}
    for name, tensors in getattr(net, "attachments", {}).items():
        files[name] = st_save({k: v.detach().cpu().contiguous() for k, v in tensors.items()})
    files.update(net.kept_files)  # kept verbatim (probes), content-addressed by the caller
    return files


def save(net: ProgressiveNet, folder: str | Path, who: Attribution | None = None) -> None:
    """Write the whole network and its records to a workspace folder, atomically.

    The history entries added since the last commit are chained, attributed to ``who``
    (default: the login user and host) and signed if ``who.signer`` is set
    (``evidence.record.extend``): every commit extends the record.
    """

    folder = Path(folder)
    if not folder.is_dir():
        raise WorkspaceError(f"{folder}: no such workspace folder; create one with "
                             f"'colonnade new SPEC -o {folder}'")
    verify_unchanged(net)  # a sealed closure that moved is never written
    files = _tensor_files(net)
    manifest: dict[str, Any] = {
        "format": FORMAT,
        "version": VERSION,
        "colonnade": __version__,
        "saved": now(),
        "spec": net.spec.to_dict(),
        "network": net.architecture(),
        "summary": network_summary(net),
    }
    for key, value in net.meta.items():
        if not key.startswith("_"):  # in-memory notes, such as digests that did not match
            manifest[key] = value
    manifest["files"] = {name: {"sha256": _sha256(data), "bytes": len(data)}
                         for name, data in files.items()}
    extend(manifest, who or Attribution())
    _commit(folder, files, manifest)


def create(spec_or_path: Any, folder: str | Path, net: ProgressiveNet | None = None,
           who: Attribution | None = None) -> ProgressiveNet:
    """Make a new workspace from a spec (a Spec, a path, or plain data), empty or, when
    ``net`` is given (built on that spec, as by ``adopt``), holding ``net``; its record
    starts with ``created``, attributed to ``who``."""

    if isinstance(spec_or_path, Spec):
        spec = spec_or_path
    elif isinstance(spec_or_path, dict):
        spec = parse_spec(spec_or_path)
    else:
        spec = load_spec(spec_or_path)
    folder = Path(folder)
    if folder.exists() and (not folder.is_dir() or any(folder.iterdir())):
        raise WorkspaceError(f"{folder}: exists and is not an empty folder; choose a new "
                             f"path or remove it first")
    if net is None:
        net = ProgressiveNet(spec)
        net.meta["history"].append({"step": "created", "time": now()})
    made = not folder.exists()
    try:
        folder.mkdir(parents=True, exist_ok=True)
        save(net, folder, who or Attribution(verb="new"))
    except BaseException:
        if made:
            for p in folder.iterdir():
                p.unlink()
            folder.rmdir()
        raise
    return net


def _read_file(folder: Path, name: str, entry: Any, strict: bool) -> tuple[bytes, bool]:
    """A listed file's bytes and whether they match the manifest's digest."""
    want = entry.get("sha256") if isinstance(entry, dict) else None
    path = folder / name
    for candidate in (path, folder / (name + ".prev")):
        if candidate.is_file():
            data = candidate.read_bytes()
            if _sha256(data) == want:
                return data, True
    if not path.is_file():
        raise WorkspaceError(f"{path}: missing; the workspace is incomplete, restore it "
                             f"from a backup")
    if strict:
        raise WorkspaceError(f"{path}: its SHA-256 does not match the manifest, so it was "
                             f"changed outside colonnade; run 'colonnade check' to see what "
                             f"moved")
    return path.read_bytes(), False


def load(folder: str | Path, strict: bool = True, module: Any = None) -> ProgressiveNet:
    """Load a workspace as a ProgressiveNet, frozen and in eval mode.

    ``strict=False`` loads files whose digest does not match the manifest (for checks
    that must name what changed) and lists them in ``net.meta['_mismatched']``.
    ``module``: the user's own ``nn.Module`` when column 0 was adopted from Python code
    (its weights are then loaded from the workspace into it).
    A workspace whose record does not verify is refused when ``strict`` (the first
    finding in one sentence) and loaded otherwise, for ``check``.
    """
    folder = Path(folder)
    manifest = read_manifest(folder)
    if strict:
        findings = verify_chain(manifest)
        if findings:
            raise WorkspaceError(f"{folder}: the record does not verify: "
                                 f"{findings[0].message}; run 'colonnade check {folder}' "
                                 f"and restore the workspace from a copy you trust")
    try:
        spec = parse_spec(manifest.get("spec"))
    except ColonnadeError as exc:
        raise WorkspaceError(f"{folder / MANIFEST}: its spec is invalid ({exc})") from None
    files = manifest.get("files") or {}
    if WEIGHTS not in files:
        raise WorkspaceError(f"{folder / MANIFEST}: lists no {WEIGHTS}; restore it from a "
                             f"backup")
    mismatched = []
    tensors: dict[str, dict[str, torch.Tensor]] = {}
    kept: dict[str, bytes] = {}
    for name, entry in files.items():
        if not strict and not name.endswith(".safetensors") and not (folder / name).is_file():
            mismatched.append(name)  # a kept file (a probe) gone: check names it, loads the rest
            continue
        data, ok = _read_file(folder, name, entry, strict)
        if not ok:
            mismatched.append(name)
        if not name.endswith(".safetensors"):
            kept[name] = data
            continue
        try:
            tensors[name] = st_load(data)
        except (SafetensorError, ValueError, RuntimeError):
            raise WorkspaceError(f"{folder / name}: not a readable safetensors file; restore "
                                 f"it from a backup") from None
    arch = manifest.get("network") or {}
    adopted = None
    if isinstance(arch, dict) and "adopted" in arch:
        stored = tensors.get(ADOPTED_FILE, {}).get("model")
        data = None if stored is None else stored.numpy().tobytes()
        adopted = rebuild_adopted(arch["adopted"], data, module)
    net = ProgressiveNet.from_architecture(spec, arch, adopted)
    try:
        net.load_state_dict(tensors.pop(WEIGHTS), strict=True)
    except RuntimeError as exc:
        first = str(exc).splitlines()[0]
        raise WorkspaceError(f"{folder / WEIGHTS}: does not fit the manifest's network "
                             f"({first})") from None
    net.attachments = tensors
    net.kept_files = kept
    for key, value in manifest.items():
        if key not in RESERVED:
            net.meta[key] = value
    net.meta.setdefault("history", [])
    net.meta.setdefault("records", {})
    if mismatched:
        net.meta["_mismatched"] = mismatched
    net.freeze()
    return net
