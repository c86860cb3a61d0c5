"""Reading a workspace's manifest without torch: for ``show`` and anything that needs
only the record.

The manifest (``manifest.yaml``) names every file of the workspace with its SHA-256 and
holds the spec, the network's architecture, the history, seals, records and a summary of
the network's sizes written at every save. It is read with YAML's safe loader only.
Loading tensors is ``files.store``'s job; this module never imports torch, so that
read-only verbs start fast.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from ..errors import WorkspaceError

__all__ = ["MANIFEST", "WEIGHTS", "FORMAT", "VERSION", "RESERVED", "read_manifest",
           "manifest_text"]

MANIFEST = "manifest.yaml"
WEIGHTS = "weights.safetensors"
FORMAT = "colonnade-workspace"
VERSION = 1
# Manifest keys written by the store itself; every other key is the network's record
# (history, records, seals, ...), loaded back into ``net.meta``.
RESERVED = ("format", "version", "colonnade", "saved", "spec", "network", "summary", "files",
            "record")


def manifest_text(manifest: dict[str, Any]) -> str:
    """The one way a manifest is written, so ``check`` can tell a byte that was edited.

    Re-dumping a parsed manifest gives back exactly the bytes the store wrote; anything
    else was changed outside colonnade, even where it parses to the same values.
    """
    return yaml.safe_dump(manifest, sort_keys=False, allow_unicode=True)


def read_manifest(folder: str | Path) -> dict[str, Any]:
    folder = Path(folder)
    path = folder / MANIFEST
    if not folder.is_dir():
        raise WorkspaceError(f"{folder}: no such workspace folder")
    if not path.is_file():
        raise WorkspaceError(f"{folder}: not a workspace (no {MANIFEST}); create one with "
                             f"'colonnade new SPEC -o {folder}'")
    try:
        manifest = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError, OSError):
        raise WorkspaceError(f"{path}: cannot be read as YAML; restore it from a backup"
                             ) from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise WorkspaceError(f"{path}: not a colonnade manifest (format is not {FORMAT})")
    if manifest.get("version") != VERSION:
        raise WorkspaceError(f"{path}: manifest version {manifest.get('version')} is not "
                             f"supported by this colonnade (it reads version {VERSION})")
    return manifest
