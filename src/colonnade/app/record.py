"""Verbs of the record: verify it, read it, make a signing key, match a data file.

``verify_record`` reads what a workspace holds and hands it to ``evidence.integrity``;
``history`` returns the chain as typed entries; ``new_key`` writes an Ed25519 key pair;
``match_data_file`` says whether a file is the data a task was trained on. None of them
writes into a workspace, except ``start_record``, which chains the history of a workspace
made before the record existed.
"""

from __future__ import annotations

import sys
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from ..clock import now
from ..errors import DataError, UsageError, WorkspaceError
from ..evidence.integrity import RecordReport, verify_manifest
from ..evidence.provenance import match_data, sample_fingerprint
from ..evidence.record import Finding, RecordEntry, chain_found, typed_history, verify_chain
from ..evidence.signing import key_id, load_signer, load_trusted, new_key_pems
from ..files.commit import write_new_durably
from ..files.limits import MAX_MANIFEST_BYTES, read_bounded, sha256_file
from ..files.lock import reader_lock, writer_lock
from ..files.manifest import MANIFEST, manifest_text, read_manifest
from ..files.store import UNVERIFIED, listed_path, save
from ..training.data import load_for_spec
from ..training.sources import source_digest
from .transaction import attribution, read_workspace, tell_waiting, wait_seconds

__all__ = ["verify_record", "history", "new_key", "match_data_file", "start_record"]


def _digest_reader(folder: Path, files: Any):
    """A listed file's SHA-256, or None when it is missing or not a plain file inside.

    Reads at most the size the manifest recorded plus one byte, so a file that grew costs
    no more than the file it should be (its digest then differs anyway).
    """
    def digest_of(name: str) -> str | None:
        entry = files.get(name) if isinstance(files, dict) else None
        try:
            path = listed_path(folder, name, entry)
        except WorkspaceError:
            return None  # the store never writes such names; treat them as missing
        size = entry.get("bytes") if isinstance(entry, dict) else None
        if not path.is_file() or path.is_symlink():
            return None
        try:
            return sha256_file(path, size + 1 if isinstance(size, int) and size >= 0
                               else None)[0]
        except (OSError, WorkspaceError):
            return None
    return digest_of


def _one_manifest(folder: Path) -> tuple[dict[str, Any], bytes]:
    """The parsed manifest and the very bytes it was parsed from, though a writer may
    switch the manifest meanwhile: read until the bytes before and after the parse agree
    (every commit moves the record head, so a manifest's bytes never come back)."""
    path = folder / MANIFEST
    for _ in range(20):
        # Bounded like read_manifest: a manifest that claims gigabytes is never read whole.
        before = read_bounded(path, MAX_MANIFEST_BYTES, "a manifest")
        manifest = read_manifest(folder)
        if read_bounded(path, MAX_MANIFEST_BYTES, "a manifest") == before:
            return manifest, before
    raise WorkspaceError(f"{folder}: its manifest changed 20 times while it was read; check "
                         f"it when no writer is busy with it")


def verify_record(folder: str | Path, trust: Iterable[str | Path] | None = None,
                  ) -> RecordReport:
    """Check a workspace's record: every byte of the manifest, every entry of the chain,
    the state bound to its head, every file, and the signatures (against ``trust``).

    Without ``trust`` signatures are checked against the keys they carry, which proves
    nothing about who signed; with it, the chain head must be signed by a trusted key.
    """
    trusted = [load_trusted(p) for p in trust or []]
    folder = Path(folder)
    if not folder.is_dir():
        raise WorkspaceError(f"{folder}: no such workspace folder")
    path = folder / MANIFEST
    if not path.is_file():
        raise WorkspaceError(f"{folder}: not a workspace (no {MANIFEST})")
    with reader_lock(folder):  # the manifest and the files of one generation
        try:
            manifest, text = _one_manifest(folder)
        except WorkspaceError as exc:
            return RecordReport(str(folder), 0, None, [Finding(str(exc), file=MANIFEST)],
                                trusted=[k.key_id for k in trusted])
        return verify_manifest(manifest, text, manifest_text(manifest),
                               _digest_reader(folder, manifest.get("files")), trusted,
                               str(folder), MANIFEST)


def start_record(folder: str | Path, reason: str, by: str | None = None,
                 sign: str | Path | None = None) -> dict[str, Any]:
    """``colonnade record start WS --reason TEXT``: chain a workspace made before the record.

    Such a workspace (its manifest has no ``record`` section and its history entries no
    digests) is refused by every other verb. This chains its history as found and adds a
    ``record_started`` entry saying that the earlier entries were not chained when
    written, attributed to ``by`` and signed with ``sign`` like any writing verb. Every
    file must still match the SHA-256 its manifest records: a record is never started
    over files changed outside colonnade. Returns the new entry.
    """
    who = attribution("record start", by, reason, sign)  # a wrong key stops here
    if who.reason is None:
        raise UsageError("starting the record needs --reason TEXT saying why the earlier "
                         "history is taken as it is")
    folder = Path(folder)
    read_manifest(folder)  # one sentence if this is no workspace, before any lock file
    # Not ``writing()``: its strict open refuses exactly this workspace. The same lock,
    # taken before the read, so nothing committed rests on a stale read.
    with writer_lock(folder, "record start", wait_seconds(), tell_waiting):
        if "record" in read_manifest(folder):
            raise UsageError(f"{folder} has a chained record already, so there is nothing "
                             f"to start; run 'colonnade check {folder}' to verify it")
        net = read_workspace(folder, strict=False)
        changed = net.meta.pop("_mismatched", [])
        net.meta.pop(UNVERIFIED, None)  # a record made before the chain never verifies
        if changed:
            raise WorkspaceError(f"{folder}: file {changed[0]} does not match the SHA-256 "
                                 f"its manifest records, so it was changed outside colonnade "
                                 f"and a record is not started over it; restore it from a "
                                 f"backup")
        entry = chain_found(net.meta.get("history"), now())
        net.meta["history"].append(entry)
        save(net, folder, who)
    return entry


def history(folder: str | Path, verify: bool = True) -> list[RecordEntry]:
    """The workspace's history as typed entries, oldest first.

    With ``verify`` (the default) a chain or state that does not verify is refused with
    its first finding, so nothing forged is handed on as history.
    """
    manifest = read_manifest(folder)
    if verify:
        findings = verify_chain(manifest)
        if findings:
            raise WorkspaceError(f"{folder}: the record does not verify: "
                                 f"{findings[0].message}; run 'colonnade check {folder}'")
    return typed_history(manifest.get("history"))


def new_key(name: str | Path, passphrase: str | None = None) -> dict[str, Any]:
    """``colonnade key new -o NAME``: write NAME.key (mode 0600) and NAME.pub.

    Refuses to overwrite either file: losing a private key that signed records cannot be
    undone by writing a new one.
    """
    base = Path(name)
    if base.suffix in (".key", ".pub"):
        base = base.with_suffix("")
    private_path, public_path = Path(f"{base}.key"), Path(f"{base}.pub")
    if not private_path.parent.is_dir():
        raise UsageError(f"{private_path.parent}: no such folder for the key files")
    for p in (private_path, public_path):
        if p.exists():
            raise UsageError(f"{p}: exists already; choose another name (a key that signed "
                             f"records must not be replaced)")
    for stale in (*base.parent.glob(f".{private_path.name}.*.tmp"),
                  *base.parent.glob(f".{public_path.name}.*.tmp")):
        if stale.is_file() and not stale.is_symlink():  # left by a killed 'key new'
            stale.unlink()
    private_pem, public_pem = new_key_pems(passphrase.encode("utf-8") if passphrase else None)
    # Each file appears whole or not at all (``write_new_durably``), the public one first:
    # a crash between the two leaves a public key alone, never a secret without its pair
    # that a retry would refuse to replace.
    try:
        write_new_durably(public_path, public_pem, 0o644)
    except FileExistsError:
        raise UsageError(f"{public_path}: exists already; choose another name") from None
    try:
        write_new_durably(private_path, private_pem, 0o600)
    except BaseException:
        public_path.unlink(missing_ok=True)
        if isinstance(sys.exc_info()[1], FileExistsError):
            raise UsageError(f"{private_path}: exists already; choose another name (a key "
                             f"that signed records must not be replaced)") from None
        raise
    signer = load_signer(private_path, passphrase.encode("utf-8") if passphrase else None)
    return {"key": str(private_path), "public": str(public_path),
            "key_id": key_id(signer.private.public_key()), "encrypted": bool(passphrase)}


def match_data_file(folder: str | Path, task: str, data: str | Path) -> dict[str, Any]:
    """``check --data FILE --task NAME``: is this the file the task was trained on?"""
    net = read_workspace(folder)
    info = net.task(task)
    record = (net.meta.get("records") or {}).get(task) or {}
    recorded = record.get("data") if isinstance(record, dict) else None
    if not isinstance(recorded, dict) or "train" not in recorded:
        raise WorkspaceError(f"task {task!r} was grown before data provenance was recorded, "
                             f"so there is nothing to compare the file with")
    path = Path(data)
    if not path.exists():
        raise DataError(f"{path}: no such data file or folder")
    sha = source_digest(path)
    try:
        loaded = load_for_spec(path, net.spec, classes=info.classes,
                               class_names=info.class_names, split=False)
        samples = sample_fingerprint(loaded.x, loaded.y, info.classes)
    except DataError:
        samples = None  # not even readable as this task's data: the digest says enough
    role, sentence = match_data(recorded, sha, samples)
    return {"task": task, "file": str(path), "sha256": sha, "matches": role is not None,
            "role": role, "sentence": sentence}
