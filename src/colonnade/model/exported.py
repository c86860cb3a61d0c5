"""Read a ``torch.export`` program (a ``.pt2`` archive) without running code from the file.

What torch 2.13's own ``torch.export.load`` does with an archive, read from its source
(torch/export/pt2_archive/_package.py and torch/_export/serde/serialize.py):

* ``models/<name>.json`` (the graph, its signature, shape ranges) is JSON;
* weights and tensor constants are raw bytes described by JSON configs, except entries
  marked ``use_pickle``, which go through ``torch.load(..., weights_only=False)``: full
  pickle;
* custom and opaque objects among the constants go through ``torch._C._pickle_load_obj``
  and ``pickle.loads``; legacy ``weights/<name>.pt`` files through ``torch.load``;
* ``sample_inputs/<name>.pt`` is a ``torch.save`` pickle, read with ``weights_only=True``
  first and, when that fails, again with ``weights_only=False``: a crafted file runs code
  there even when every weight is plain;
* symbolic sizes are strings parsed by ``sympy.sympify``, which evaluates Python;
* ``guards_code`` strings are compiled with ``exec`` when the program is run;
* node names are written into the Python source ``torch.fx`` generates and executes.

So colonnade never calls ``torch.export.load``. It reads the archive's members itself,
refuses (before any tensor is made) an archive with any member or entry that would need
unpickling, an AOTInductor or other compiled payload, guard code, a symbolic size that
is not a plain named symbol, a node name that is not an identifier, or an operator
outside ``torch.ops.aten`` and ``operator.getitem``; never reads the sample inputs; and
only then hands the checked JSON and the raw tensors to torch's deserializer.
"""

from __future__ import annotations

import io
import json
import re
import zipfile
from typing import Any

import torch

from ..errors import DataError

__all__ = ["load_exported_program"]

_MEMBER = re.compile(
    r"^[A-Za-z0-9_.-]+/(archive_format|archive_version|byteorder|\.data/version|"
    r"\.data/serialization_id|models/model\.json|data/weights/model_weights_config\.json|"
    r"data/weights/weight_\d+|data/constants/model_constants_config\.json|"
    r"data/constants/tensor_\d+|data/sample_inputs/model\.pt)$")
_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_TARGET = re.compile(r"^(torch\.ops\.aten\.[A-Za-z0-9_]+\.[A-Za-z0-9_]+|_operator\.getitem)$")
# A named size symbol as torch writes it: Symbol('s77', positive=True, integer=True).
_SYMBOL = re.compile(r"Symbol\('[a-z]+[0-9]+'(?:, (?:positive|integer|nonnegative)=True)*\)")
_EXPR_REST = re.compile(r"^[S0-9+\-*/() ]*$")


def _refuse(path: str, what: str) -> DataError:
    return DataError(f"{path}: {what}; colonnade loads torch.export programs without "
                     f"running code from the file, so re-save it with torch.export.save "
                     f"from a model with plain tensor weights and a static or batch-only "
                     f"dynamic shape")


def _walk(value: Any, path: str, found: list[str]) -> None:
    """Collect what the JSON holds that torch would evaluate, execute or look up."""
    if isinstance(value, dict):
        for key, item in value.items():
            if key == "expr_str" and isinstance(item, str):
                if not _EXPR_REST.match(_SYMBOL.sub("S", item)):
                    found.append(f"the symbolic size {item[:60]!r} is not a named symbol")
            elif key == "target" and isinstance(item, str):
                if not _TARGET.match(item):
                    found.append(f"the operator {item[:60]!r} is not an ATen operator")
            elif key == "name" and isinstance(item, str) and not _IDENTIFIER.match(item):
                found.append(f"the name {item[:60]!r} is not an identifier")
            _walk(item, path, found)
    elif isinstance(value, list):
        for item in value:
            _walk(item, path, found)


def _check_config(raw: bytes, path: str, what: str) -> dict[str, Any]:
    try:
        config = json.loads(raw)
    except (ValueError, UnicodeDecodeError):
        raise _refuse(path, f"its {what} configuration is not JSON") from None
    entries = config.get("config") if isinstance(config, dict) else None
    if not isinstance(entries, dict):
        raise _refuse(path, f"its {what} configuration is malformed")
    for name, meta in entries.items():
        if not isinstance(meta, dict):
            raise _refuse(path, f"its {what} configuration is malformed")
        if meta.get("use_pickle") is not False:
            raise _refuse(path, f"the {what} {name!r} is stored as a pickle")
        if not str(meta.get("path_name", "")).startswith(("weight_", "tensor_")):
            raise _refuse(path, f"the {what} {name!r} is an object, not a tensor")
        device = ((meta.get("tensor_meta") or {}).get("device") or {}).get("type")
        if device != "cpu":
            raise _refuse(path, f"the {what} {name!r} was saved on device {device!r}, not cpu")
    return config


def load_exported_program(data: bytes, path: str = "model.pt2") -> torch.export.ExportedProgram:
    """An ExportedProgram from the bytes of a ``.pt2`` archive; see the module docstring."""
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        names = archive.namelist()
    except (zipfile.BadZipFile, ValueError, OSError):
        raise DataError(f"{path}: not a torch.export archive (.pt2 is a zip archive written "
                        f"by torch.export.save)") from None
    roots = {name.split("/", 1)[0] for name in names}
    if len(roots) != 1:
        raise DataError(f"{path}: not a torch.export archive (expected one top-level folder)")
    root = roots.pop()
    if f"{root}/models/model.json" not in names:  # checked first: a torch.save file is a zip too
        raise DataError(f"{path}: not a torch.export program (the archive holds no "
                        f"models/model.json; a file written by torch.save is not one); save "
                        f"the model with torch.export.save(torch.export.export(model, (x,)), "
                        f"PATH)")
    for name in names:
        if name.endswith("/"):
            continue
        if not _MEMBER.match(name):
            raise _refuse(path, f"the archive holds {name.split('/', 1)[-1]!r}, which "
                                f"torch would read through pickle or compiled code")
    try:
        program_json = archive.read(f"{root}/models/model.json")
        version = archive.read(f"{root}/archive_version").decode()
    except KeyError:
        raise DataError(f"{path}: not a torch.export archive (no models/model.json)") from None
    try:
        program = json.loads(program_json)
    except (ValueError, UnicodeDecodeError):
        raise _refuse(path, "its program is not JSON") from None
    if not isinstance(program, dict) or "graph_module" not in program:
        raise DataError(f"{path}: not a torch.export archive (the program is malformed)")
    if program.get("guards_code"):
        raise _refuse(path, "it carries guard code, which torch would execute")
    found: list[str] = []
    _walk(program, path, found)
    if found:
        raise _refuse(path, found[0])
    configs = {}
    for kind, member in (("weight", "data/weights/model_weights_config.json"),
                         ("constant", "data/constants/model_constants_config.json")):
        full = f"{root}/{member}"
        configs[kind] = _check_config(archive.read(full), path, kind) if full in names else None
    return _deserialize(data, program_json, version, path)


def _deserialize(data: bytes, program_json: bytes, version: str, path: str,
                 ) -> torch.export.ExportedProgram:
    """Hand the checked archive to torch's own deserializer, sample inputs left out.

    Everything torch reads here has passed the checks above: the configs hold only plain
    tensors (so ``_load_state_dict``/``_load_constants`` take their raw-bytes branch) and
    the program's strings are identifiers, ATen targets and named symbols.
    """
    from torch._export.serde import schema
    from torch._export.serde.serialize import ExportedProgramDeserializer, _bytes_to_dataclass
    from torch.export.pt2_archive._package import (
        PT2ArchiveReader,
        _load_constants,
        _load_state_dict,
    )
    from torch.export.pt2_archive.constants import ARCHIVE_VERSION_VALUE

    if version != ARCHIVE_VERSION_VALUE:
        raise DataError(f"{path}: archive version {version} is not the one this torch "
                        f"({torch.__version__}) reads ({ARCHIVE_VERSION_VALUE})")
    try:
        with PT2ArchiveReader(io.BytesIO(data)) as reader:
            state_dict = _load_state_dict(reader, "model")
            constants = _load_constants(reader, "model")
        serialized = _bytes_to_dataclass(schema.ExportedProgram, program_json)
        return ExportedProgramDeserializer().deserialize(serialized, state_dict, constants,
                                                         None)
    except (RuntimeError, ValueError, KeyError, TypeError, AssertionError) as exc:
        raise DataError(f"{path}: torch could not read this program "
                        f"({exc.__class__.__name__}); re-save it with torch.export.save "
                        f"from torch {torch.__version__}") from None
