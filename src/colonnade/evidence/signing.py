"""Ed25519 signatures over record entries, through the ``cryptography`` package.

A signature binds a key holder to one entry's digest and, through the chain, to every
entry before it. The private key stays with its holder (a PEM file, PKCS#8, optionally
encrypted with a passphrase); the entry carries the public key and a short key id so that
a reader can see who signed, but nothing in a workspace is trusted by itself: ``check
--trust KEY.pub`` says which public keys the reader accepts (RFC 8032 for Ed25519; PEM
and PKCS#8 as ``cryptography`` writes them).

A signature here is a software record of who committed a step, not a legal electronic
signature.
"""

from __future__ import annotations

import base64
import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature, UnsupportedAlgorithm
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)

from ..errors import UsageError
from .record import (
    HEAD_SIGNATURE,
    PREV_SIGNATURE,
    Finding,
    describe_entry,
    signature_digest,
    signature_required_from,
)

__all__ = ["Signer", "TrustedKey", "EntrySignature", "signature_report", "key_id",
           "new_key_pems", "load_signer", "load_trusted", "check_signature",
           "SIGNATURE_ALGORITHM"]

SIGNATURE_ALGORITHM = "ed25519"
_MESSAGE_DOMAIN = b"colonnade record signature\n"
_BLOCK_FIELDS = ("algorithm", "key", "public", "value")


def _raw_public(public: Ed25519PublicKey) -> bytes:
    return public.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def key_id(public: Ed25519PublicKey) -> str:
    """A short, stable name of a public key: the first 16 hex digits of its SHA-256."""
    return hashlib.sha256(_raw_public(public)).hexdigest()[:16]


def _message(sha256_hex: str) -> bytes:
    return _MESSAGE_DOMAIN + sha256_hex.encode("ascii")


@dataclass(frozen=True)
class Signer:
    """A private key ready to sign entry digests."""

    private: Ed25519PrivateKey
    path: str

    @property
    def key_id(self) -> str:
        return key_id(self.private.public_key())

    def sign(self, sha256_hex: str) -> dict[str, str]:
        """The signature block stored with an entry."""
        public = _raw_public(self.private.public_key())
        return {"algorithm": SIGNATURE_ALGORITHM, "key": self.key_id,
                "public": base64.b64encode(public).decode("ascii"),
                "value": base64.b64encode(self.private.sign(_message(sha256_hex))
                                          ).decode("ascii")}


@dataclass(frozen=True)
class TrustedKey:
    """A public key the reader accepts, as read from a ``.pub`` file."""

    public: Ed25519PublicKey
    path: str

    @property
    def key_id(self) -> str:
        return key_id(self.public)


def new_key_pems(passphrase: bytes | None = None) -> tuple[bytes, bytes]:
    """A fresh key pair as (private PEM, public PEM); the private one encrypted if asked."""
    private = Ed25519PrivateKey.generate()
    encryption: serialization.KeySerializationEncryption = (
        serialization.BestAvailableEncryption(passphrase) if passphrase
        else serialization.NoEncryption())
    private_pem = private.private_bytes(serialization.Encoding.PEM,
                                        serialization.PrivateFormat.PKCS8, encryption)
    public_pem = private.public_key().public_bytes(
        serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)
    return private_pem, public_pem


def _read(path: str | Path, what: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise UsageError(f"{path}: no such {what} file; make a key pair with 'colonnade key "
                         f"new -o NAME'") from None
    except OSError as exc:
        raise UsageError(f"{path}: cannot read the {what} file ({exc.strerror})") from None


def load_signer(path: str | Path, passphrase: bytes | None = None) -> Signer:
    """Read a private key file; one sentence when it is missing, wrong or locked."""
    data = _read(path, "private key")
    try:
        private = serialization.load_pem_private_key(data, password=passphrase or None)
    except TypeError:
        if passphrase:
            raise UsageError(f"{path}: this key is not protected by a passphrase; unset "
                             f"COLONNADE_KEY_PASSPHRASE") from None
        raise UsageError(f"{path}: the key is protected by a passphrase; set "
                         f"COLONNADE_KEY_PASSPHRASE or run from a terminal to be asked") from None
    except (ValueError, UnsupportedAlgorithm):
        raise UsageError(f"{path}: not a readable private key, or the passphrase is wrong; "
                         f"give the .key file 'colonnade key new' wrote") from None
    if not isinstance(private, Ed25519PrivateKey):
        raise UsageError(f"{path}: not an Ed25519 key; make one with 'colonnade key new -o "
                         f"NAME'")
    return Signer(private, str(path))


def load_trusted(path: str | Path) -> TrustedKey:
    """Read a public key file given to ``--trust``."""
    data = _read(path, "public key")
    try:
        public = serialization.load_pem_public_key(data)
    except (ValueError, UnsupportedAlgorithm):
        raise UsageError(f"{path}: not a readable public key; give the .pub file 'colonnade "
                         f"key new' wrote") from None
    if not isinstance(public, Ed25519PublicKey):
        raise UsageError(f"{path}: not an Ed25519 public key; make one with 'colonnade key "
                         f"new -o NAME'")
    return TrustedKey(public, str(path))


def check_signature(block: Any, sha256_hex: str) -> tuple[bool, str | None]:
    """Whether a stored signature block verifies over ``sha256_hex``, and its key id.

    The public key is taken from the block itself, so a valid result says only that the
    holder of *that* key signed; whether the key is trusted is the caller's question.
    """
    # The block is outside the entry's digest, so nothing but these four fields may be in it.
    if (not isinstance(block, Mapping) or set(block) != set(_BLOCK_FIELDS)
            or block.get("algorithm") != SIGNATURE_ALGORITHM):
        return False, None
    try:
        raw = base64.b64decode(str(block.get("public")), validate=True)
        value = base64.b64decode(str(block.get("value")), validate=True)
        public = Ed25519PublicKey.from_public_bytes(raw)
    except (ValueError, TypeError):
        return False, None
    kid = key_id(public)
    if block.get("key") != kid:
        return False, kid
    try:
        public.verify(value, _message(sha256_hex))
    except InvalidSignature:
        return False, kid
    return True, kid


# ----------------------------------------------------------------------------- the policy
@dataclass(frozen=True)
class EntrySignature:
    """How one entry stands: ``trusted``, ``untrusted`` (valid, by a key not trusted),
    ``valid`` (no trust was asked), ``invalid`` or ``unsigned``."""

    seq: int
    status: str
    key: str | None


def _binding(history: list[Any], seq: int, record: Any) -> tuple[bool, Any, str]:
    """Whether entry ``seq``'s signature block is bound, the digest bound, and by what: the
    next entry's ``prev_signature_sha256``, or for the head the record section's."""
    if seq < len(history):
        after = history[seq]
        if isinstance(after, Mapping) and PREV_SIGNATURE in after:
            return True, after[PREV_SIGNATURE], describe_entry(after, seq + 1)
    elif isinstance(record, Mapping) and HEAD_SIGNATURE in record:
        return True, record[HEAD_SIGNATURE], "the record section"
    return False, None, ""


def signature_report(history: list[Any], trusted: list[TrustedKey] | None,
                     record: Any = None,
                     ) -> tuple[list[EntrySignature], list[Finding], list[str]]:
    """Per-entry signature status, the findings that fail a check, and notes.

    Every signature present must verify. After an entry that asks for it
    (``require_signed``, set by ``seal --require-signed``), every entry must be signed.
    With ``trusted`` keys the chain head must be signed by one of them; since the head's
    digest covers every entry before it, that key holder vouches for the whole record.
    """
    trusted_ids = {k.key_id for k in trusted or []}
    statuses: list[EntrySignature] = []
    findings: list[Finding] = []
    for seq, entry in enumerate(history, start=1):
        block = entry.get("signature") if isinstance(entry, Mapping) else None
        ok, kid = (False, None) if block is None else check_signature(
            block, str(entry.get("entry_sha256")))
        bound, digest, by = _binding(history, seq, record)
        if bound and digest != signature_digest(entry) and (block is None or ok):
            # (a block that does not verify is named as such below)
            findings.append(Finding(f"{describe_entry(entry, seq)}: its signature was "
                                    f"{'removed' if block is None else 'added or replaced'} "
                                    f"after it was committed ({by} binds another)", seq))
        if block is None:
            statuses.append(EntrySignature(seq, "unsigned", None))
        elif not ok:
            statuses.append(EntrySignature(seq, "invalid", kid))
            findings.append(Finding(f"{describe_entry(entry, seq)}: its signature (key "
                                    f"{kid or 'unreadable'}) does not verify over its digest, "
                                    f"so the entry was changed after it was signed", seq))
        elif not trusted_ids:
            statuses.append(EntrySignature(seq, "valid", kid))
        else:
            statuses.append(EntrySignature(seq, "trusted" if kid in trusted_ids
                                           else "untrusted", kid))
    required = signature_required_from(history)
    if required is not None:
        for status in statuses[required:]:
            if status.status == "unsigned" or (trusted_ids and status.status == "untrusted"):
                entry = history[status.seq - 1]
                how = ("unsigned" if status.status == "unsigned"
                       else f"signed by key {status.key}, which is not trusted")
                findings.append(Finding(
                    f"{describe_entry(entry, status.seq)} is {how}, but "
                    f"{describe_entry(history[required - 1], required)} requires every "
                    f"later step to be signed", status.seq))
                break
    notes: list[str] = []
    if trusted_ids and statuses:
        last_trusted = max((s.seq for s in statuses if s.status == "trusted"), default=0)
        head = statuses[-1]
        if last_trusted < head.seq:
            first = last_trusted + 1
            first_name = describe_entry(history[first - 1], first)
            span = (first_name if first == head.seq
                    else f"{first_name} and the {head.seq - first} after it")
            foreign = sorted({s.key for s in statuses[last_trusted:]
                              if s.status == "untrusted" and s.key})
            by = (f" (signed by key {', '.join(foreign)}, which is not among the --trust "
                  f"keys)" if foreign else "")
            vouched = (f"the last entry a trusted key vouches for is entry {last_trusted}"
                       if last_trusted else "no entry is signed by a trusted key")
            findings.append(Finding(f"{span} {'is' if first == head.seq else 'are'} not "
                                    f"signed by a trusted key{by}; {vouched}", first))
    unsigned = [s.seq for s in statuses if s.status == "unsigned"]
    if unsigned:
        notes.append(f"{len(unsigned)} of {len(statuses)} history entries are unsigned "
                     f"({_ranges(unsigned)})")
    if not trusted_ids and any(s.status == "valid" for s in statuses):
        notes.append("signatures were verified against the keys they carry, not against "
                     "keys you trust; pass --trust KEY.pub to know who signed")
    return statuses, findings, notes


def _ranges(numbers: list[int]) -> str:
    """``1-3, 5, 7-9`` for a sorted list of entry positions."""
    parts: list[str] = []
    start = prev = numbers[0]
    for n in numbers[1:] + [None]:  # type: ignore[list-item]
        if n is not None and n == prev + 1:
            prev = n
            continue
        parts.append(f"entries {start}-{prev}" if start != prev else f"entry {start}")
        if n is not None:
            start = prev = n
    return ", ".join(parts)
