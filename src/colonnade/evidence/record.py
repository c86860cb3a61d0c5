"""The record: a workspace's history as an append-only chain of digests.

Every history entry carries the digest of the entry before it (``prev_sha256``) and the
digest of its own canonical content (``entry_sha256``), so editing, deleting, inserting or
reordering an entry breaks a link that ``check`` names. Each entry also carries
``state_sha256``, the digest of the whole workspace state (every manifest section except
the history itself: spec, network, records, seals, file digests, ...) as it was committed
with that entry. The manifest's ``record`` section repeats the chain head's digest, the
chain length and the state as one digest per section, so a change anywhere in the manifest
is named by section (``seals/pump_b_faults``) and the files are bound through the digests
in ``files``.

Digests are SHA-256 over canonical JSON (sorted keys, no spaces, ASCII) of the parsed
manifest; the manifest's bytes are bound as well, because the store writes exactly the
canonical YAML of its content and ``check`` compares the file with it. Without signatures
the chain catches accidents and careless edits; someone who rewrites the manifest and
recomputes every digest is caught only by a signature (``evidence.signing``).

The chain is extended in one place, ``extend``, which the store calls at every commit;
``verify_chain`` is the matching check. Both take plain manifest data: reading the files
of a workspace is the store's and the app's business.
"""

from __future__ import annotations

import getpass
import hashlib
import json
import socket
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from ..clock import now
from ..errors import WorkspaceError

__all__ = ["RECORD_FORMAT", "Attribution", "Finding", "RecordEntry", "canonical",
           "chained_prefix",
           "value_digest", "entry_digest", "state_digests", "extend", "verify_chain",
           "describe_entry", "typed_history", "default_author", "signature_required_from",
           "unchain", "chain_found", "RECORD_STARTED", "signature_digest", "PREV_SIGNATURE",
           "HEAD_SIGNATURE", "record_never_started"]

RECORD_FORMAT = "colonnade-record-1"
RECORD_STARTED = "record_started"  # the step that chains a history written before the record
# Manifest sections that the state digest leaves out: the chain and the chain's own summary.
UNBOUND = ("history", "record")
# Fields an entry's own digest leaves out: the digest itself and the signature over it.
_UNDIGESTED = ("entry_sha256", "signature")
_ENTRY_DOMAIN = b"colonnade record entry\n"
_SIGNATURE_DOMAIN = b"colonnade record signature block\n"
# Each entry binds the signature block of the entry before it (its digest, or null when
# that entry is unsigned), and the record section the head's: a signature is outside the
# digest of its own entry, so without this it could be removed, added or replaced by
# another key's valid one, and ``check`` would still pass (``signing.signature_report``
# checks the binding). Entries written before this field existed carry none.
PREV_SIGNATURE = "prev_signature_sha256"
HEAD_SIGNATURE = "head_signature_sha256"
_RECORD_KEYS = {"format", "length", "head", "state"}
_STATE_DOMAIN = b"colonnade record state\n"


def default_author() -> str:
    """Who is acting when ``--by`` is not given: the login name and the host."""
    try:
        user = getpass.getuser()
    except (KeyError, OSError):  # no login name in this environment (some containers)
        user = "unknown"
    return f"{user}@{socket.gethostname()}"


@dataclass(frozen=True)
class Attribution:
    """Who commits, as part of which verb, and why; ``signer`` signs the new entries.

    ``signer`` is any object with ``sign(sha256_hex) -> dict`` (``evidence.signing.Signer``).
    """

    verb: str = "save"
    by: str | None = None
    reason: str | None = None
    signer: Any = None

    @property
    def author(self) -> str:
        return (self.by or "").strip() or default_author()


@dataclass(frozen=True)
class Finding:
    """One thing in the record that does not match, as one sentence.

    ``entry`` is the 1-based history position it concerns, ``section`` the manifest
    section (``seals/pump_b_faults``), ``file`` the workspace file; any may be None.
    """

    message: str
    entry: int | None = None
    section: str | None = None
    file: str | None = None


@dataclass(frozen=True)
class RecordEntry:
    """One history entry, typed: what happened, who did it, when, why, and its links."""

    seq: int
    step: str
    time: str | None
    by: str | None
    reason: str | None
    verb: str | None
    task: str | None
    details: dict[str, Any]
    prev: str | None
    sha256: str | None
    state_sha256: str | None
    signature: dict[str, Any] | None = field(default=None)

    @property
    def signed(self) -> bool:
        return self.signature is not None


# ----------------------------------------------------------------------------- digests
def _tagged(value: Any) -> str:
    """Values JSON has no form for (dates a hand edit left unquoted) get a tagged string."""
    return f"!{type(value).__name__}:{value}"


def canonical(value: Any) -> bytes:
    """Canonical bytes of plain data: sorted keys, no whitespace, ASCII only."""
    try:
        text = json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                          allow_nan=True, default=_tagged)
    except (TypeError, ValueError, RecursionError):
        # keys of mixed types cannot be sorted; a manifest colonnade wrote never has them
        text = json.dumps(repr(value))
    return text.encode("ascii")


def value_digest(value: Any, domain: bytes = b"") -> str:
    return hashlib.sha256(domain + canonical(value)).hexdigest()


def entry_digest(entry: Mapping[str, Any]) -> str:
    """An entry's digest: everything in it but its own digest and its signature."""
    return value_digest({k: v for k, v in entry.items() if k not in _UNDIGESTED},
                        _ENTRY_DOMAIN)


def state_digests(manifest: Mapping[str, Any]) -> dict[str, str]:
    """One digest per manifest section and per item of a mapping section.

    ``spec``, ``seals/pump_a_faults``, ``files/weights.safetensors``, ...: fine enough
    that ``check`` names the item that moved, coarse enough to stay small.
    """
    out: dict[str, str] = {}
    for key, value in manifest.items():
        if key in UNBOUND:
            continue
        out[str(key)] = value_digest(value)
        if isinstance(value, Mapping):
            for child, inner in value.items():
                out[f"{key}/{child}"] = value_digest(inner)
    return out


def signature_digest(entry: Any) -> str | None:
    """The digest of an entry's signature block, None when it carries none."""
    block = entry.get("signature") if isinstance(entry, Mapping) else None
    return None if block is None else value_digest(block, _SIGNATURE_DOMAIN)


def _state_digest(state: Mapping[str, str]) -> str:
    return value_digest(dict(state), _STATE_DOMAIN)


# ----------------------------------------------------------------------------- describing
def describe_entry(entry: Any, seq: int) -> str:
    """``history entry 7 (task_sealed pump_b_faults v1)``: how findings name an entry."""
    if not isinstance(entry, Mapping):
        return f"history entry {seq}"
    words = [str(entry.get("step", "?"))]
    if entry.get("task") is not None:
        words.append(str(entry["task"]))
    if entry.get("version") is not None:
        words.append(f"v{entry['version']}")
    return f"history entry {seq} ({' '.join(words)})"


_KNOWN = ("seq", "step", "time", "by", "reason", "verb", "task", "prev_sha256", "entry_sha256",
          "state_sha256", "signature", PREV_SIGNATURE)


def typed_history(history: Any) -> list[RecordEntry]:
    """The history as typed entries, in order; plain data that is not an entry is skipped."""
    out = []
    for index, entry in enumerate(history if isinstance(history, list) else [], start=1):
        if not isinstance(entry, Mapping):
            continue
        signature = entry.get("signature")
        out.append(RecordEntry(
            seq=int(entry["seq"]) if isinstance(entry.get("seq"), int) else index,
            step=str(entry.get("step", "")), time=_opt(entry.get("time")),
            by=_opt(entry.get("by")), reason=_opt(entry.get("reason")),
            verb=_opt(entry.get("verb")), task=_opt(entry.get("task")),
            details={k: v for k, v in entry.items() if k not in _KNOWN},
            prev=_opt(entry.get("prev_sha256")), sha256=_opt(entry.get("entry_sha256")),
            state_sha256=_opt(entry.get("state_sha256")),
            signature=dict(signature) if isinstance(signature, Mapping) else None))
    return out


def _opt(value: Any) -> str | None:
    return None if value is None else str(value)


# ----------------------------------------------------------------------------- writing
def chained_prefix(history: list[Any]) -> int:
    """How many entries at the start are already chained (carry a digest)."""
    count = 0
    for entry in history:
        if not (isinstance(entry, Mapping) and "entry_sha256" in entry):
            break
        count += 1
    return count


def extend(manifest: dict[str, Any], who: Attribution) -> list[dict[str, Any]]:
    """Chain the history entries this commit added, bind the state, sign; return them.

    Called by the store on the finished manifest, after every other section is final. A
    commit that added no entry of its own gets one naming its verb, so every change of
    state is an entry. Refuses (WorkspaceError) when the chain it would extend is broken:
    a new head must never bless an edited record.
    """
    history = manifest.setdefault("history", [])
    if not isinstance(history, list):
        raise WorkspaceError("refusing to save: the workspace's history is not a list; "
                             "reload the workspace")
    done = chained_prefix(history)
    broken = _chain_findings(history[:done])
    if any(isinstance(e, Mapping) and "entry_sha256" in e for e in history[done:]):
        broken.append(Finding("an entry without a digest sits between chained entries"))
    if broken:
        raise WorkspaceError(f"refusing to save: the record does not verify "
                             f"({broken[0].message}); reload the workspace and run "
                             f"'colonnade check' on it")
    pending = history[done:]
    if not pending:
        pending = [{"step": who.verb, "time": now()}]
        history.extend(pending)
    manifest.pop("record", None)
    state = state_digests(manifest)
    state_sha = _state_digest(state)
    prev = history[done - 1]["entry_sha256"] if done else None
    prev_signature = signature_digest(history[done - 1]) if done else None
    author = who.author
    for offset, entry in enumerate(pending):
        if not isinstance(entry, dict):
            raise WorkspaceError("refusing to save: a new history entry is not a mapping")
        entry.setdefault("time", now())
        entry["seq"] = done + offset + 1
        entry["verb"] = who.verb
        entry["by"] = author
        if who.reason and not entry.get("reason"):
            entry["reason"] = who.reason
        entry.setdefault("reason", None)
        entry["prev_sha256"] = prev
        entry[PREV_SIGNATURE] = prev_signature
        entry["state_sha256"] = state_sha
        entry["entry_sha256"] = entry_digest(entry)
        if who.signer is not None:
            entry["signature"] = who.signer.sign(entry["entry_sha256"])
        prev, prev_signature = entry["entry_sha256"], signature_digest(entry)
    manifest["record"] = {"format": RECORD_FORMAT, "length": len(history), "head": prev,
                          "state": state, HEAD_SIGNATURE: prev_signature}
    return pending


def chain_found(history: list[Any], when: str) -> dict[str, Any]:
    """Chain a history written before the record existed, as it was found, and return
    the entry that says so (the caller appends it; the next commit chains and signs it).

    The found entries get their links (``seq``, ``prev_sha256``, ``entry_sha256``) and
    nothing else: no author, verb or state is invented for them. The returned
    ``record_started`` entry names how many there were, so that nobody reads the chain
    as proof of who wrote them or that they were never edited before this point.
    """
    if not isinstance(history, list):
        raise WorkspaceError("the workspace's history is not a list, so it cannot be chained; "
                             "restore the manifest from a backup")
    prev = None
    for index, entry in enumerate(history, start=1):
        if not isinstance(entry, dict):
            raise WorkspaceError(f"{describe_entry(entry, index)} is not a mapping, so the "
                                 f"history cannot be chained; restore the manifest from a "
                                 f"backup")
        if "entry_sha256" in entry or "signature" in entry:
            raise WorkspaceError(f"{describe_entry(entry, index)} is chained already, so the "
                                 f"record was started before; run 'colonnade check' on it")
        entry["seq"] = index
        entry["prev_sha256"] = prev
        entry["entry_sha256"] = prev = entry_digest(entry)
    n = len(history)
    span = "no entry" if n == 0 else ("entry 1" if n == 1 else f"entries 1 to {n}")
    return {"step": RECORD_STARTED, "time": when, "unchained_entries": n,
            "note": f"{span} of this history were written before colonnade chained its "
                    f"record; they are chained here as they were found, so the record "
                    f"vouches for them only from this entry on, and says nothing of who "
                    f"wrote them or whether they were edited before"}


def unchain(entries: list[dict[str, Any]]) -> None:
    """Take the chain fields off entries, so the next commit chains them anew (used when
    a result made in a staging copy is committed into the workspace)."""
    for entry in entries:
        for key in ("seq", "prev_sha256", "verb", "by", "state_sha256", "entry_sha256",
                    "signature", PREV_SIGNATURE):
            entry.pop(key, None)


def signature_required_from(history: Any) -> int | None:
    """The 1-based position after which every entry must be signed, if a seal asked so."""
    for index, entry in enumerate(history if isinstance(history, list) else [], start=1):
        if isinstance(entry, Mapping) and entry.get("require_signed"):
            return index
    return None


# ----------------------------------------------------------------------------- checking
def _chain_findings(history: list[Any]) -> list[Finding]:
    """Each entry's own digest and its link to the one before, in order."""
    out: list[Finding] = []
    prev = None
    for index, entry in enumerate(history, start=1):
        name = describe_entry(entry, index)
        if not isinstance(entry, Mapping):
            out.append(Finding(f"{name} is not a mapping", index))
        elif not isinstance(entry.get("entry_sha256"), str):
            out.append(Finding(f"{name} carries no digest, so it is not part of the chain "
                               f"(added by hand, or written before the record was chained)",
                               index))
        elif entry_digest(entry) != entry["entry_sha256"]:
            out.append(Finding(f"{name}: its content does not match its digest", index))
        elif entry.get("seq") != index or entry.get("prev_sha256") != prev:
            out.append(Finding(f"{name}: it does not follow the entry before it (its link "
                               f"to the previous digest or its position does not match), so "
                               f"an entry was removed, inserted or moved", index))
        if isinstance(entry, Mapping):
            prev = entry.get("entry_sha256")
    return out


def record_never_started(manifest: Mapping[str, Any]) -> bool:
    """Whether the manifest is of a workspace made before the record was chained: no
    ``record`` section and no history entry with a digest (``record start`` chains it)."""
    history = manifest.get("history")
    return manifest.get("record") is None and not (isinstance(history, list) and any(
        isinstance(e, Mapping) and "entry_sha256" in e for e in history))


def verify_chain(manifest: Mapping[str, Any]) -> list[Finding]:
    """Every finding about the chain and the state bound to its head, first one first."""
    history = manifest.get("history")
    if not isinstance(history, list) or not history:
        return [Finding("the manifest has no history, so nothing binds its content; restore "
                        "the workspace from a copy", section="history")]
    record = manifest.get("record")
    if record_never_started(manifest):
        return [Finding("the workspace was made before colonnade chained its record (no "
                        "history entry carries a digest); start its record with 'colonnade "
                        "record start WS --reason TEXT'", section="record")]
    out = _chain_findings(history)
    head = history[-1] if isinstance(history[-1], Mapping) else {}
    # A head written with the signature binding needs the record to name its signature.
    keys = _RECORD_KEYS | ({HEAD_SIGNATURE} if PREV_SIGNATURE in head else set())
    if (not isinstance(record, Mapping) or not isinstance(record.get("state"), Mapping)
            or set(record) - {HEAD_SIGNATURE} != _RECORD_KEYS or not keys <= set(record)
            or record.get("format") != RECORD_FORMAT):
        out.append(Finding("the manifest's record section is missing or malformed, so the "
                           "state is not bound to the chain", section="record"))
        return out
    n = len(history)
    if record.get("length") != n or record.get("head") != head.get("entry_sha256"):
        out.append(Finding(f"the history ends at entry {n} but the record's head names "
                           f"entry {record.get('length')}: entries were removed from or "
                           f"added at the end", n, section="record"))
    state = dict(record["state"])
    if _state_digest(state) != head.get("state_sha256"):
        out.append(Finding(f"the record's state does not match the one bound to the chain "
                           f"head, {describe_entry(head, n)}", n, section="record"))
    now_state = state_digests(manifest)
    for key in sorted(set(state) | set(now_state), key=_section_order(manifest)):
        if state.get(key) == now_state.get(key):
            continue
        if key not in now_state:
            what = f"manifest section {key} is missing but the record binds it"
        elif key not in state:
            what = f"manifest section {key} is not bound to the record (added by hand)"
        else:
            what = f"manifest section {key} does not match the state bound to the record"
        if "/" not in key and any(k.startswith(key + "/") for k in set(state) | set(now_state)
                                  if state.get(k) != now_state.get(k)):
            continue  # the item below names it more precisely
        out.append(Finding(f"{what}, whose head is {describe_entry(head, n)}", n,
                           section=key))
    return out


def _section_order(manifest: Mapping[str, Any]) -> Callable[[str], tuple[int, str]]:
    order = {str(k): i for i, k in enumerate(manifest)}
    return lambda key: (order.get(key.split("/", 1)[0], len(order)), key)
