"""Workspace read and write: ``manifest.yaml`` plus safetensors files, under the lock.

``save`` commits a new generation (``files.commit``: content-addressed data files behind
one atomic pointer) while holding the writer lock (``files.lock``), and refuses to write
a network loaded from a generation that is no longer current, so nothing it commits rests
on a stale read. ``load`` reads the manifest and the files it names under the reader
lock, so a reader never sees a generation half collected. Loading reads YAML with the
safe loader and tensors with safetensors: no code runs.
"""

from __future__ import annotations

import copy
import os
import shutil
import socket
from pathlib import Path
from typing import Any

import torch
from safetensors import SafetensorError
from safetensors.torch import load as st_load
from safetensors.torch import save as st_save

from .._version import __version__
from ..clock import now
from ..errors import ColonnadeError, WorkspaceError
from ..evidence.record import Attribution, chained_prefix, extend, verify_chain
from ..model.adopted import ADOPTED_FILE, rebuild_adopted
from ..model.budget import readable_bytes, tensor_budget
from ..model.guard import verify_unchanged
from ..model.network import ProgressiveNet
from ..model.schema import Spec
from ..model.spec import load_spec, parse_spec
from .commit import (
    clear_interrupted_creation,
    confined_stored,
    fsync_dir,
    interrupted_creation,
    pending_recovery,
    sha_hex,
    write_durably,
    write_generation,
)
from .lock import READER_LOCK, WRITER_LOCK, reader_lock, writer_lock
from .manifest import FORMAT, MANIFEST, RESERVED, VERSION, WEIGHTS, manifest_text, read_manifest
from .summary import network_summary

__all__ = ["create", "require_creatable", "save", "load", "atomic_write", "read_manifest",
           "listed_files", "listed_path", "LOADED_HEAD", "UNVERIFIED", "MANIFEST", "WEIGHTS"]

# The record head a network was loaded at; ``save`` refuses when the workspace moved on.
LOADED_HEAD = "_loaded_head"
# The first finding of a record that did not verify, when loaded with strict=False.
UNVERIFIED = "_unverified_record"

def atomic_write(path: str | Path, data: bytes | str) -> None:
    """Write a file so that a crash leaves either the old content or the new, never half.

    For files outside workspaces (exports, reports, diagrams); workspaces are committed by
    ``save``. The same durable write as a commit's (``files.commit.write_durably``).
    """
    path = Path(path)
    write_durably(path.parent, path.name, data.encode("utf-8") if isinstance(data, str)
                  else data)
    fsync_dir(path.parent)


def _head(manifest: dict[str, Any] | None) -> str | None:
    record = (manifest or {}).get("record")
    return record.get("head") if isinstance(record, dict) else None


def _chained(manifest: dict[str, Any] | None) -> set[str]:
    history = (manifest or {}).get("history")
    return {e["entry_sha256"] for e in history if isinstance(e, dict)
            and isinstance(e.get("entry_sha256"), str)} if isinstance(history, list) else set()


def listed_path(folder: str | Path, name: str, entry: Any) -> Path:
    """Where the file a manifest entry names lies: its content address (``data/``), or
    the older top-level place; WorkspaceError if the entry names no plain file inside."""
    stored, legacy = confined_stored(Path(folder), name, entry)
    return stored if stored.is_file() or not legacy.is_file() else legacy


def listed_files(folder: str | Path) -> dict[str, Path]:
    """Where each file the manifest lists lies now, by its name in the manifest."""
    folder = Path(folder)
    return {name: listed_path(folder, name, entry)
            for name, entry in (read_manifest(folder).get("files") or {}).items()}


def _tensor_files(net: ProgressiveNet) -> dict[str, bytes]:
    state = {k: v.detach().cpu().contiguous() for k, v in net.state_dict().items()}
    files = {WEIGHTS: st_save(state, metadata={"format": FORMAT})}
    for name, tensors in getattr(net, "attachments", {}).items():
        files[name] = st_save({k: v.detach().cpu().contiguous() for k, v in tensors.items()})
    files.update(net.kept_files)  # kept verbatim (probes), content-addressed by the caller
    return files


def save(net: ProgressiveNet, folder: str | Path, who: Attribution | None = None,
         wait: float | None = None) -> None:
    """Write the whole network and its records to a workspace folder as a new generation.

    Holds the writer lock (waiting up to ``wait`` seconds, else BusyError, exit 3) and
    refuses a network loaded from a generation that is no longer the current one (a
    network built in memory may only replace a workspace that holds nothing but its
    creation). The
    history entries added since the last commit are chained, attributed to ``who``
    (default: the login user and host) and signed if ``who.signer`` is set
    (``evidence.record.extend``): every commit extends the record. An interrupted commit
    found on the way (``.pending``) is recorded as a ``recovered`` entry first.
    """

    folder = Path(folder)
    if not folder.is_dir():
        raise WorkspaceError(f"{folder}: no such workspace folder; create one with "
                             f"'colonnade new SPEC -o {folder}'")
    verify_unchanged(net)  # a sealed closure that moved is never written
    # Loaded with strict=False (as ``check`` loads): a commit would bind what was changed
    # outside colonnade to a fresh head, and ``check`` would pass on it afterwards.
    changed = net.meta.get("_mismatched")
    if changed:
        raise WorkspaceError(f"{folder}: refusing to save a network whose file "
                             f"{changed[0]} did not match the SHA-256 its manifest records "
                             f"when it was loaded; a commit would record the changed bytes "
                             f"as genuine; restore the file from a backup and load again")
    if net.meta.get(UNVERIFIED):
        raise WorkspaceError(f"{folder}: refusing to save a network loaded from a record "
                             f"that does not verify ({net.meta[UNVERIFIED]}); a commit would "
                             f"record the edit as genuine; restore the workspace from a copy "
                             f"you trust")
    who = who or Attribution()
    files = _tensor_files(net)
    with writer_lock(folder, who.verb or "save", wait):
        current = read_manifest(folder) if (folder / MANIFEST).exists() else None
        if current is not None and net.meta.get(LOADED_HEAD) != _head(current) \
                and not (LOADED_HEAD not in net.meta and _only_created(current)):
            raise WorkspaceError(f"{folder}: changed since this network was loaded (another "
                                 f"process committed to it); load it again and repeat the "
                                 f"change, so nothing committed in between is lost")
        # The history is chained in place (the verb's own entries get their digests); a
        # commit that fails before its commit point puts it back as it was, so a retry
        # neither records a recovery twice nor keeps entries of a commit that never was.
        history = net.meta.get("history")
        before = copy.deepcopy(history) if isinstance(history, list) else None
        manifest: dict[str, Any] = {}
        try:
            manifest = _manifest_of(net, files)
            recovered = pending_recovery(folder, _chained(current))
            if recovered is not None:
                listed = manifest.setdefault("history", [])
                listed.insert(chained_prefix(listed), recovered)
            extend(manifest, who)
            note = {"verb": who.verb, "by": who.author, "pid": os.getpid(),
                    "host": socket.gethostname(), "time": now(),
                    "from_head": _head(current), "to_head": _head(manifest)}
            retired = set((current or {}).get("files") or {})
            write_generation(folder, files, manifest_text(manifest), note, retired)
        except BaseException:
            if before is not None and _committed_head(folder) != _head(manifest):
                history[:] = before
            raise
        finally:
            net.meta[LOADED_HEAD] = _committed_head(folder)


def _committed_head(folder: Path) -> str | None:
    """The record head of the workspace's current manifest; None while ``create`` has not
    committed one yet (so a failure before the first commit is reported as itself, not as
    a missing manifest)."""
    return _head(read_manifest(folder)) if (folder / MANIFEST).exists() else None


def _only_created(manifest: dict[str, Any]) -> bool:
    """A workspace that holds nothing yet but its creation: a network built in memory
    (never loaded from a workspace) may take its place, as ``create`` then ``save`` do."""
    history = manifest.get("history")
    return (isinstance(history, list) and len(history) == 1
            and isinstance(history[0], dict) and history[0].get("step") == "created"
            and not (manifest.get("network") or {}).get("tasks"))


def _manifest_of(net: ProgressiveNet, files: dict[str, bytes]) -> dict[str, Any]:
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
    manifest["files"] = {name: {"sha256": sha_hex(data), "bytes": len(data)}
                         for name, data in files.items()}
    return manifest


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
    require_creatable(folder)
    if net is None:
        net = ProgressiveNet(spec)
        net.meta["history"].append({"step": "created", "time": now()})
    who = who or Attribution(verb="new")
    try:
        folder.mkdir(parents=True)
        made = True
    except FileExistsError:
        made = False
    # Emptiness is checked again under the writer lock: of two processes creating the
    # same folder at once, the second finds the first one's workspace and stops, instead
    # of replacing it while both say they created it.
    with writer_lock(folder, who.verb or "new"):
        try:
            require_creatable(folder, clear=True)
            save(net, folder, who)
        except BaseException:
            if made and not (folder / MANIFEST).exists():
                shutil.rmtree(folder, ignore_errors=True)
            raise
    return net


def require_creatable(folder: str | Path, clear: bool = False) -> None:
    """Refuse a path that holds anything but an empty folder, the lock files a create
    that failed there left, or what a create killed before its commit point left
    (``commit.interrupted_creation``), which ``clear`` (under the writer lock) removes."""
    folder = Path(folder)
    if not folder.exists() and not folder.is_symlink():
        return
    refused = WorkspaceError(f"{folder}: exists and is not an empty folder; choose a new "
                             f"path or remove it first")
    if not folder.is_dir():
        raise refused
    if all(p.name in (WRITER_LOCK, READER_LOCK) for p in folder.iterdir()):
        return
    leftovers = interrupted_creation(folder)
    if leftovers is None:
        raise refused
    if clear:
        clear_interrupted_creation(folder, leftovers)


def _check_listed_sizes(folder: Path, files: dict[str, Any]) -> None:
    """Refuse, before reading any file, a workspace whose listed files would not fit in
    memory: loading holds every listed file's bytes and the tensors built from them, so
    their recorded sizes together may take at most the tensor budget (half of this
    machine's memory; ``model.budget``). A hand-made manifest naming a sparse file of
    terabytes with a matching size is stopped here, not by the operating system."""
    total = 0
    for entry in files.values():
        size = entry.get("bytes") if isinstance(entry, dict) else None
        if isinstance(size, int) and not isinstance(size, bool) and size > 0:
            total += size
    if total > tensor_budget():
        raise WorkspaceError(f"{folder / MANIFEST}: its files take {readable_bytes(total)}, "
                             f"more than this machine can load (at most "
                             f"{readable_bytes(tensor_budget())}, half of its memory); open it "
                             f"on a machine with more memory")


def _locate(folder: Path, name: str, entry: Any, strict: bool) -> Path:
    """The file a manifest entry names: its content address, else the older top-level
    place; for ``check`` (not strict) also the one stored file of that name, if the
    entry's digest was edited."""
    if not strict and not (isinstance(entry, dict) and isinstance(entry.get("sha256"), str)
                           and len(entry["sha256"]) == 64):
        entry = {"sha256": "0" * 64}
    stored, legacy = confined_stored(folder, name, entry)
    if stored.is_file() or legacy.is_file():
        return stored if stored.is_file() else legacy
    if not strict:
        stem, dot, ext = name.partition(".")
        others = sorted(stored.parent.glob(f"{stem}.*{dot}{ext}")) if stored.parent.is_dir() \
            else []
        if len(others) == 1:
            return others[0]
    return stored


def _read_file(folder: Path, name: str, entry: Any, strict: bool) -> tuple[bytes, bool]:
    """A listed file's bytes and whether they match the manifest's digest.

    The size the manifest recorded is compared before anything is read, so a file that
    grew (a sparse file claiming terabytes) is refused without allocating it.
    """
    want = entry.get("sha256") if isinstance(entry, dict) else None
    size = entry.get("bytes") if isinstance(entry, dict) else None
    path = _locate(folder, name, entry, strict)
    if not path.is_file():
        raise WorkspaceError(f"{folder / name}: missing; the workspace is incomplete, "
                             f"restore it from a backup")
    actual = path.stat().st_size
    changed = (f"{path}: its SHA-256 does not match the manifest, so it was changed outside "
               f"colonnade; run 'colonnade check' to see what moved")
    if isinstance(size, int) and actual != size:
        if strict or actual > 2 * size + (64 << 20):
            raise WorkspaceError(changed if strict else
                                 f"{path}: holds {actual} bytes where the manifest records "
                                 f"{size}; restore it from a backup")
    elif strict and not isinstance(size, int):
        raise WorkspaceError(f"{folder / MANIFEST}: records no size for {name}; restore it "
                             f"from a backup")
    with open(path, "rb") as handle:
        data = handle.read(actual + 1)
    ok = sha_hex(data) == want
    if strict and not ok:
        raise WorkspaceError(changed)
    return data, ok


def load(folder: str | Path, strict: bool = True, module: Any = None) -> ProgressiveNet:
    """Load a workspace as a ProgressiveNet, frozen and in eval mode.

    ``strict=False`` loads files whose digest does not match the manifest (for checks
    that must name what changed) and lists them in ``net.meta['_mismatched']``.
    ``module``: the user's own ``nn.Module`` when column 0 was adopted from Python code
    (its weights are then loaded from the workspace into it).
    A workspace whose record does not verify is refused when ``strict`` (the first
    finding in one sentence) and loaded otherwise, for ``check``. The manifest and its
    files are read under the reader lock: one generation, whole.
    """
    folder = Path(folder)
    with reader_lock(folder):
        manifest = read_manifest(folder)
        findings = verify_chain(manifest)
        if strict and findings:
            raise WorkspaceError(f"{folder}: the record does not verify: "
                                 f"{findings[0].message}; run 'colonnade check {folder}' "
                                 f"and restore the workspace from a copy you trust")
        try:
            spec = parse_spec(manifest.get("spec"))
        except ColonnadeError as exc:
            raise WorkspaceError(f"{folder / MANIFEST}: its spec is invalid ({exc})") from None
        files = manifest.get("files") or {}
        if not isinstance(files, dict) or WEIGHTS not in files:
            raise WorkspaceError(f"{folder / MANIFEST}: lists no {WEIGHTS}; restore it from "
                                 f"a backup")
        _check_listed_sizes(folder, files)
        mismatched = []
        raw: dict[str, bytes] = {}
        for name, entry in files.items():
            if not strict and not name.endswith(".safetensors") \
                    and not _locate(folder, name, entry, strict).is_file():
                mismatched.append(name)  # a kept file (a probe) gone: check names it
                continue
            raw[name], ok = _read_file(folder, name, entry, strict)
            if not ok:
                mismatched.append(name)
    tensors: dict[str, dict[str, torch.Tensor]] = {}
    kept: dict[str, bytes] = {}
    for name, data in raw.items():
        if not name.endswith(".safetensors"):
            kept[name] = data
            continue
        try:
            tensors[name] = st_load(data)
        except (SafetensorError, ValueError, RuntimeError):
            raise WorkspaceError(f"{folder / name}: not a readable safetensors file; restore "
                                 f"it from a backup") from None
    del raw
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
    if findings:  # strict=False only; ``save`` refuses such a network
        net.meta[UNVERIFIED] = findings[0].message
    net.meta[LOADED_HEAD] = _head(manifest)
    net.freeze()
    return net
