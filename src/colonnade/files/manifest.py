"""Reading a workspace's manifest without torch: for ``show`` and anything that needs
only the record.

The manifest (``manifest.yaml``) names every file of the workspace with its SHA-256 and
holds the spec, the network's architecture, the history, seals, records and a summary of
the network's sizes written at every save. A workspace may come from anyone, so the
manifest is refused unread when it is larger than ``MAX_MANIFEST_BYTES``, refused while
it is scanned when it holds more than ``MAX_MANIFEST_VALUES`` values, and parsed by the
safe loader with every YAML anchor and alias refused: colonnade never writes them, and an
alias bomb (a few lines standing for billions of values) is stopped before anything
expands it.
Loading tensors is ``files.store``'s job; this module never imports torch, so that
read-only verbs start fast.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml

from ..errors import DataError, WorkspaceError
from ..model.yamlfile import load_yaml
from .limits import MAX_MANIFEST_BYTES, MAX_MANIFEST_VALUES, read_bounded

__all__ = ["MANIFEST", "WEIGHTS", "FORMAT", "VERSION", "RESERVED", "MAX_MANIFEST_BYTES",
           "read_manifest", "manifest_text"]

MANIFEST = "manifest.yaml"
WEIGHTS = "weights.safetensors"
FORMAT = "colonnade-workspace"
VERSION = 1
# Manifest keys written by the store itself; every other key is the network's record
# (history, records, seals, ...), loaded back into ``net.meta``.
RESERVED = ("format", "version", "colonnade", "saved", "spec", "network", "summary", "files",
            "record")


class _NoAliasDumper(yaml.SafeDumper):
    """The safe dumper, writing a value twice where PyYAML would write an anchor and alias.

    PyYAML writes ``&id001`` / ``*id001`` when one object appears twice; the reader
    refuses every alias (see ``read_manifest``), so the writer never makes one.
    """

    def ignore_aliases(self, data: Any) -> bool:
        return True

    def represent_text(self, data: str) -> Any:
        """A string, refused if it holds a lone surrogate: Python's stand-in for a byte
        of a file name or argument that is not UTF-8. PyYAML would write it as an escape
        that no YAML reader accepts, so the committed manifest could never be read again."""
        bad = _SURROGATE.search(data)
        if bad:
            raw = data.encode("utf-8", "surrogateescape")  # the name's own bytes
            shown = raw.decode("ascii", "backslashreplace")[:80]
            raise DataError(f"the name '{shown}' is not valid UTF-8 text (a file or folder "
                            f"name, or an argument, in another encoding), and a workspace "
                            f"records text in UTF-8 only; rename it in UTF-8")
        return self.represent_str(data)


_NoAliasDumper.add_representer(str, _NoAliasDumper.represent_text)
_SURROGATE = re.compile("[\ud800-\udfff]")


def manifest_text(manifest: dict[str, Any]) -> str:
    """The one way a manifest is written, so ``check`` can tell a byte that was edited.

    Re-dumping a parsed manifest gives back exactly the bytes the store wrote; anything
    else was changed outside colonnade, even where it parses to the same values.
    """
    return yaml.dump(manifest, Dumper=_NoAliasDumper, sort_keys=False, allow_unicode=True)


def read_manifest(folder: str | Path) -> dict[str, Any]:
    """The parsed manifest of ``folder``, or one sentence saying why it cannot be read."""
    folder = Path(folder)
    path = folder / MANIFEST
    if not folder.is_dir():
        raise WorkspaceError(f"{folder}: no such workspace folder")
    if not path.is_file():
        raise WorkspaceError(f"{folder}: not a workspace (no {MANIFEST}); create one with "
                             f"'colonnade new SPEC -o {folder}'")
    if path.is_symlink():  # like every file of a workspace (``limits.confined``)
        raise WorkspaceError(f"{path}: is a symbolic link, and a workspace's manifest must lie "
                             f"inside it; replace the link with the file it points to")
    data = read_bounded(path, MAX_MANIFEST_BYTES, "a manifest")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise WorkspaceError(f"{path}: not UTF-8 text, so not a manifest colonnade wrote; "
                             f"restore it from a backup") from None
    manifest = load_yaml(text, str(path), WorkspaceError, aliases=False,
                         invalid="cannot be read as YAML{at}; restore it from a backup",
                         max_nodes=MAX_MANIFEST_VALUES)
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise WorkspaceError(f"{path}: not a colonnade manifest (format is not {FORMAT})")
    if manifest.get("version") != VERSION:
        raise WorkspaceError(f"{path}: manifest version {manifest.get('version')} is not "
                             f"supported by this colonnade (it reads version {VERSION})")
    return manifest
