"""Whether a workspace's record can be trusted: chain, manifest bytes, files, signatures.

This puts the record's checks together on what a workspace holds, handed in by the caller
(the parsed manifest, its bytes, and a function reading a listed file's SHA-256), so the
evidence layer needs no knowledge of where or how the store keeps its files. The order of
the findings is the order of trust: the manifest's bytes, the chain, the state bound to
its head, the files the state names, then the signatures over the chain.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

from .record import Finding, verify_chain
from .signing import EntrySignature, TrustedKey, signature_report

__all__ = ["RecordReport", "verify_manifest", "text_findings", "file_findings"]


@dataclass
class RecordReport:
    """The verdict on a workspace's record; ``findings[0]`` is the first thing that failed."""

    workspace: str | None
    entries: int
    head: str | None
    findings: list[Finding] = field(default_factory=list)
    signatures: list[EntrySignature] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    trusted: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return not self.findings

    @property
    def first(self) -> str | None:
        return self.findings[0].message if self.findings else None

    def to_dict(self) -> dict[str, Any]:
        return {"workspace": self.workspace, "passed": self.passed, "entries": self.entries,
                "head": self.head, "findings": [asdict(f) for f in self.findings],
                "signatures": [asdict(s) for s in self.signatures],
                "notes": list(self.notes), "trusted": list(self.trusted)}


def text_findings(text: bytes, canonical_text: str, name: str) -> list[Finding]:
    """The manifest's bytes against the canonical form of its content (see record.py)."""
    expected = canonical_text.encode("utf-8")
    if text == expected:
        return []
    have, want = text.split(b"\n"), expected.split(b"\n")
    line = next((i for i, (a, b) in enumerate(zip(have, want, strict=False), start=1)
                 if a != b), min(len(have), len(want)) + 1)
    return [Finding(f"{name} line {line} is not as colonnade wrote it (its bytes differ "
                    f"from the canonical form of its content), so the file was edited",
                    file=name)]


def file_findings(files: Any, digest_of: Callable[[str], str | None]) -> list[Finding]:
    """Every file the manifest lists against its SHA-256 (``digest_of`` None: missing)."""
    if not isinstance(files, Mapping):
        return [Finding("the manifest's files section is missing or malformed",
                        section="files")]
    out = []
    for name, entry in files.items():
        want = entry.get("sha256") if isinstance(entry, Mapping) else None
        have = digest_of(str(name))
        if have is None:
            out.append(Finding(f"file {name} is missing from the workspace", file=str(name)))
        elif have != want:
            out.append(Finding(f"file {name}: its SHA-256 does not match the digest the "
                               f"record binds, so it was changed outside colonnade",
                               file=str(name)))
    return out


def verify_manifest(manifest: Mapping[str, Any], text: bytes, canonical_text: str,
                    digest_of: Callable[[str], str | None],
                    trusted: list[TrustedKey] | None = None, workspace: str | None = None,
                    manifest_name: str = "manifest.yaml") -> RecordReport:
    """Check everything the record binds; see the module docstring for the order."""
    history = manifest.get("history") if isinstance(manifest.get("history"), list) else []
    head = history[-1].get("entry_sha256") if history and isinstance(history[-1], Mapping) else None
    report = RecordReport(workspace, len(history), head,
                          trusted=[k.key_id for k in trusted or []])
    report.findings += text_findings(text, canonical_text, manifest_name)
    report.findings += verify_chain(manifest)
    report.findings += file_findings(manifest.get("files"), digest_of)
    statuses, findings, notes = signature_report(history, trusted,
                                                   manifest.get("record"))
    report.signatures, report.notes = statuses, notes
    report.findings += findings
    return report
