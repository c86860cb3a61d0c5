"""What ships: the joint closure of one or more tasks, as plain data and a torch .pt file.

An artifact holds the tasks' joint closure and nothing else: the columns their heads
reach, the live adapters between them (trimmed adapters are gone) and one head per
task, under the grown network's own ``state_dict`` keys, so each task's closure digest
equals its seal's. Its architecture is plain data naming torch layers (standalone.py
rebuilds it with torch alone and runs it as ``forward_all`` does: each column once, one
output per task). Adapter kinds beyond linear and nonlinear can take part by giving
their module a method ``export_steps()`` that returns ``[(op, name), ...]`` with ``op``
either ``"scale"`` (multiply by the scalar parameter ``name``) or ``"module"`` (apply
the child module ``name``), applied in order.

The metadata (``artifact_meta``) travels in every format: task names and class names,
the input shape, each task's closure digest and seal version, the workspace's record
head, colonnade's version, and for int8 the calibration data's digest.
"""

from __future__ import annotations

import io
import secrets
from typing import Any

import torch
import torch.nn as nn

from .._version import __version__
from ..clock import now
from ..errors import ColonnadeError, SealedError, UsageError
from ..model.adapters import JointAdapter, LinearAdapter, NonlinearAdapter
from ..model.adopted import AdoptedColumn
from ..model.digest import closure_digests
from ..model.exported import load_exported_program
from ..model.guard import closure_definition, sealed_tasks
from ..model.network import Column, ProgressiveNet
from ..model.parts import CLOSURE_DEFINITION
from .standalone import FORMAT, LAYERS, VERSION, ArtifactModel, program_column

__all__ = ["ExportError", "describe_layer", "artifact_architecture", "artifact_state",
           "artifact_meta", "artifact_blob", "artifact_model", "torch_bytes", "joint_closure",
           "refuse_adopted_pt", "adopted_description", "adopted_program"]


_NORM = "input_norm."  # state_dict prefix of the network's input normalisation


class ExportError(ColonnadeError):
    """A task holds a part that the artifact format cannot describe."""


# Constructor arguments of each exportable layer, read back from the module itself.
_ARGS: dict[str, tuple[str, ...]] = {
    "Linear": ("in_features", "out_features"),
    "Conv1d": ("in_channels", "out_channels", "kernel_size", "stride", "padding", "dilation",
               "groups", "padding_mode"),
    "BatchNorm1d": ("num_features", "eps", "momentum", "affine", "track_running_stats"),
    "LayerNorm": ("normalized_shape", "eps", "elementwise_affine"),
    "GroupNorm": ("num_groups", "num_channels", "eps", "affine"),
    "GELU": ("approximate",),
    "LeakyReLU": ("negative_slope",),
    "Dropout": ("p",),
    "MaxPool1d": ("kernel_size", "stride", "padding", "dilation", "ceil_mode"),
    "AvgPool1d": ("kernel_size", "stride", "padding", "ceil_mode", "count_include_pad"),
    "AdaptiveAvgPool1d": ("output_size",),
    "Flatten": ("start_dim", "end_dim"),
    "Upsample": ("size", "scale_factor", "mode", "align_corners", "recompute_scale_factor"),
}
_ARGS["Conv2d"] = _ARGS["Conv1d"]
_ARGS["BatchNorm2d"] = _ARGS["BatchNorm1d"]
_ARGS["MaxPool2d"] = _ARGS["MaxPool1d"]
_ARGS["AvgPool2d"] = _ARGS["AvgPool1d"]
_ARGS["AdaptiveAvgPool2d"] = _ARGS["AdaptiveAvgPool1d"]


def _plain(value: Any) -> Any:
    return list(value) if isinstance(value, tuple) else value


def describe_layer(module: nn.Module) -> dict[str, Any]:
    """Plain data that ``standalone.build_layer`` turns back into the same layer."""
    if type(module) is nn.Sequential:
        return {"type": "Sequential", "layers": [describe_layer(m) for m in module]}
    name = type(module).__name__
    if LAYERS.get(name) is not type(module):  # exact classes only: no custom forward
        raise ExportError(f"layer {name} cannot be exported; the artifact format knows "
                          f"{', '.join(sorted(LAYERS))}")
    args = {a: _plain(getattr(module, a)) for a in _ARGS.get(name, ())}
    if name in ("Linear", "Conv1d", "Conv2d"):
        args["bias"] = module.bias is not None
    if name == "LayerNorm":
        args["bias"] = getattr(module, "bias", None) is not None
    return {"type": name, "args": args}


def _adapter_steps(key: str, module: nn.Module) -> list[dict[str, Any]]:
    steps = _own_steps(key, module)
    if getattr(module, "bridge", None) is not None:  # a tap's shape bridge runs first
        steps.insert(0, {"op": "module", "name": "bridge",
                         "layer": describe_layer(module.bridge)})
    return steps


def _own_steps(key: str, module: nn.Module) -> list[dict[str, Any]]:
    if type(module) is LinearAdapter:
        order = [("module", "U")]
    elif type(module) is NonlinearAdapter:
        order = [("scale", "alpha"), ("module", "V"), ("module", "act"), ("module", "U")]
    elif type(module) is JointAdapter and module.tap_shape is not None:
        # V on the columns, plus the tap's branch (its bridge, then T), then U.
        branch = [("module", "T")]
        if module.tap_bridge is not None:
            branch.insert(0, ("module", "tap_bridge"))
        return [*_named_steps(module, [("module", "V")]),
                {"op": "add_branch", "steps": _named_steps(module, branch)},
                *_named_steps(module, [("module", "U")])]
    elif type(module) is JointAdapter:
        order = [("module", "V"), ("module", "U")]
    elif callable(getattr(module, "export_steps", None)):
        order = list(module.export_steps())
    else:
        raise ExportError(f"adapter {key} of kind {type(module).__name__} cannot be exported; "
                          f"give it an export_steps() method (see files/artifact.py)")
    return _named_steps(module, order)


def _named_steps(module: nn.Module, order: list[tuple[str, str]]) -> list[dict[str, Any]]:
    steps = []
    for op, name in order:
        if op == "scale":
            steps.append({"op": "scale", "name": name,
                          "shape": list(getattr(module, name).shape)})
        else:
            steps.append({"op": "module", "name": name,
                          "layer": describe_layer(getattr(module, name))})
    return steps


def adopted_description(col: AdoptedColumn) -> dict[str, Any]:
    """Column 0 as the artifact names it: the adopted model's format, file digest and taps
    (its outputs are ``[tap_1, ..., tap_n, logits]``)."""
    rec = col.record
    return {"format": rec.format, "runtime": rec.runtime, "sha256": rec.sha256,
            "taps": list(rec.taps), "tap_shapes": [list(s) for s in rec.tap_shapes],
            "classes": rec.classes, "outputs": len(rec.taps) + 1}


def _tap_read(net: ProgressiveNet, key: str) -> int | None:
    """The tap index an adapter reads of the adopted column (column 0), or None (the usual
    block). A joint adapter reads its other sources' usual block (``standalone``)."""
    tap = net.adapter_info[key].extra.get("tap")
    return None if tap is None else int(tap)


def _check_tasks(net: ProgressiveNet, tasks: list[str]) -> list[str]:
    if not tasks:
        raise UsageError("name at least one task to export")
    seen: list[str] = []
    for task in tasks:
        info = net.task(task)  # unknown: one sentence listing the tasks
        if getattr(info, "state", "live") != "live":
            raise UsageError(f"task {task!r} is retired, so it is no longer exported; name "
                             f"live tasks only")
        if task in seen:
            raise UsageError(f"task {task!r} is named twice; name each task once")
        seen.append(task)
    return [t for t in net.tasks if t in seen]  # growth order, whatever order was asked


def joint_closure(net: ProgressiveNet, tasks: list[str],
                  ) -> tuple[dict[int, int], list[str]]:
    """Columns the tasks' outputs depend on, each with how many leading blocks of it they
    run (block-level closures: a column's unused tail stays out), and the adapters."""
    depths: dict[int, int] = {}
    adapters: set[str] = set()
    for task in tasks:
        closure = net.closure(task)
        for k in closure.columns:
            depths[k] = max(depths.get(k, 0), closure.depth(k))
        adapters.update(closure.adapters)
    return dict(sorted(depths.items())), sorted(adapters)


def artifact_architecture(net: ProgressiveNet, tasks: list[str]) -> dict[str, Any]:
    """The joint closure of ``tasks`` as plain data: columns, live adapters, heads."""
    tasks = _check_tasks(net, tasks)
    columns, adapters = [], []
    for k, depth in joint_closure(net, tasks)[0].items():
        col = net.columns[k]
        if isinstance(col, AdoptedColumn):  # run as it stands: never described as layers
            columns.append({"index": k, "adopted": adopted_description(col)})
            continue
        if type(col) is not Column:
            raise ExportError(f"column {k} ({type(col).__name__}) cannot be written as an "
                              f"artifact; export tasks whose closure leaves it out")
        blocks = list(col.blocks)[:depth]  # only the blocks the tasks run
        columns.append({
            "index": k,
            "stem": [describe_layer(m) for m in col.stem],
            "blocks": [{"weighted": describe_layer(b.weighted),
                        "post": [describe_layer(m) for m in b.post]} for b in blocks],
        })
        for b in range(len(blocks)):
            for key, _ in net.adapters_into_block(k, b):
                adapters.append({"key": key, "sources": list(net.adapter_sources(key)),
                                 "column": k, "block": b, "head": None,
                                 "reads": _tap_read(net, key),
                                 "steps": _adapter_steps(key, net.adapters[key])})
    heads = []
    for task in tasks:
        for key, _ in net.adapters_into_head(task):
            adapters.append({"key": key, "sources": list(net.adapter_sources(key)),
                             "column": None, "block": None, "head": task,
                             "reads": _tap_read(net, key),
                             "steps": _adapter_steps(key, net.adapters[key])})
        heads.append({"task": task, "head": describe_layer(net.heads[task]),
                      "head_column": net.task(task).column, "reads": net.head_reads(task)})
    normalized = any(k.startswith(_NORM) for k in net.state_dict())
    return {"tasks": heads, "columns": columns, "adapters": adapters,
            "normalize_shape": list(net.input_shape) if normalized else None}


def artifact_state(net: ProgressiveNet, tasks: list[str]) -> dict[str, torch.Tensor]:
    """Own copies (CPU, contiguous) of the joint closure's tensors, and nothing else.

    The input normalisation (``input_norm.*``, where the spec has one) feeds every task.
    """
    state = {k: v for k, v in net.state_dict().items() if k.startswith(_NORM)}
    for task in tasks:
        state.update(net.closure_state(task))
    return {k: v.detach().cpu().clone().contiguous() for k, v in state.items()}


def _normalization(net: ProgressiveNet) -> dict[str, list[float]] | None:
    values = getattr(net, "normalization", None)
    return dict(values) if isinstance(values, dict) else None


def _seal_of(net: ProgressiveNet, task: str) -> dict[str, Any] | None:
    """The task's newest active seal as recorded in ``net.meta``, read defensively."""
    entry = sealed_tasks(net).get(task)
    if entry is None:
        return None
    closure = entry.get("closure") if isinstance(entry.get("closure"), dict) else {}
    return {"version": entry.get("version"), "time": entry.get("time"),
            "closure_sha256": closure.get("sha256"), "entry_sha256": entry.get("entry_sha256")}


def _class_names(net: ProgressiveNet, task: str) -> list[str] | None:
    names = getattr(net.task(task), "class_names", None)
    return [str(n) for n in names] if names else None


def _record_head(net: ProgressiveNet) -> str | None:
    """The digest at the head of the workspace's record, where the record keeps one."""
    record = net.meta.get("record")
    head = record.get("head") if isinstance(record, dict) else None
    return str(head) if head else None


def artifact_meta(net: ProgressiveNet, tasks: list[str], precision: str = "float32",
                  calibration: dict[str, Any] | None = None) -> dict[str, Any]:
    """Everything a device needs besides the weights, as plain data (JSON-ready).

    Refuses (SealedError) a sealed task whose closure no longer matches its seal.
    """
    tasks = _check_tasks(net, tasks)
    rows = []
    for task in tasks:
        digest, _ = closure_digests(net.closure_state(task))
        seal = _seal_of(net, task)
        sealed_digest = digest
        definition = closure_definition(net.meta["seals"][task][-1]) if seal else None
        if seal is not None and definition != CLOSURE_DEFINITION:
            # A seal made under another closure definition is compared by its own; the
            # file still ships only what the task runs.
            try:
                sealed_digest, _ = closure_digests(net.closure_state(task, definition))
            except ColonnadeError:
                sealed_digest = None
        if seal is not None and seal["closure_sha256"] not in (None, sealed_digest):
            raise SealedError(f"task {task!r} no longer matches its seal v{seal['version']}; "
                              f"run 'colonnade check' on the workspace before exporting")
        rows.append({"name": task, "output": task, "classes": net.task(task).classes,
                     "class_names": _class_names(net, task), "closure_sha256": digest,
                     "seal": seal})
    adopted = [adopted_description(net.columns[k]) for k in joint_closure(net, tasks)[0]
               if isinstance(net.columns[k], AdoptedColumn)]
    return {"format": FORMAT, "version": VERSION, "export_id": secrets.token_hex(8),
            "tasks": rows, "input_shape": list(net.input_shape),
            "adopted": adopted[0] if adopted else None,
            "normalize": _normalization(net),
            "precision": precision, "calibration": calibration, "record_head": _record_head(net),
            "spec": net.spec.name, "colonnade": __version__,
            "torch": str(torch.__version__), "exported": now()}


def adopted_program(col: AdoptedColumn) -> bytes:
    """An adopted torch column as ``torch.export`` program bytes, for a .pt artifact.

    A ``.pt2`` column ships its own file, unchanged (the bytes whose SHA-256 its seal
    covers). A column adopted from Python code is captured by ``torch.export.export``
    (batch dimension dynamic), since its class cannot travel in a file that loads without
    running code; the export's checks then prove its outputs bit-identical or refuse.
    """
    if col.data is not None:
        return col.data
    example = torch.zeros(2, *col.record.input)
    try:
        program = torch.export.export(col.model, (example,),
                                      dynamic_shapes=({0: torch.export.Dim("batch")},))
    except Exception as exc:  # torch.export raises many kinds for code it cannot capture
        raise ExportError(f"torch.export cannot capture the adopted module "
                          f"({type(exc).__name__}); export to FILE.onnx, or adopt a .pt2 "
                          f"program") from None
    buf = io.BytesIO()
    torch.export.save(program, buf)
    return buf.getvalue()


def artifact_blob(net: ProgressiveNet, tasks: list[str], meta: dict[str, Any] | None = None,
                  program: bool = False) -> dict[str, Any]:
    """The dictionary a .pt artifact holds (see standalone.py); ``program`` adds an
    adopted torch column's program (``adopted_program``) when the tasks read it."""
    tasks = _check_tasks(net, tasks)
    blob = {"format": FORMAT, "version": VERSION,
            "architecture": artifact_architecture(net, tasks),
            "state": artifact_state(net, tasks),
            "meta": meta if meta is not None else artifact_meta(net, tasks)}
    adopted = [c["adopted"] for c in blob["architecture"]["columns"] if "adopted" in c]
    if program and adopted and adopted[0]["runtime"] == "torch":
        data = adopted_program(net.adopted)
        blob["adopted_program"] = torch.frombuffer(bytearray(data), dtype=torch.uint8)
    return blob


def artifact_model(blob: dict[str, Any], adopted: nn.Module | None = None) -> ArtifactModel:
    """The blob's model, frozen, in eval mode: one output per task.

    ``adopted`` (a copy of the network's adopted torch column) runs as column 0; else the
    blob's own adopted program does, read without running code from it
    (model.exported); else an adopted column's outputs are inputs of the model
    (``ArtifactModel.given``, an adopted ONNX model run beside it).
    """
    model = ArtifactModel(blob["architecture"])
    if adopted is None:
        adopted = program_column(blob, load_exported_program)
    if adopted is not None:
        model.attach_adopted(model.given[0], adopted)
    model.load_state_dict(blob["state"], strict=True)
    return model.requires_grad_(False).eval()


def refuse_adopted_pt(blob: dict[str, Any]) -> None:
    """A .pt artifact is run by torch alone: an adopted ONNX model cannot be in it."""
    for col in blob["architecture"]["columns"]:
        adopted = col.get("adopted")
        if adopted is not None and adopted["runtime"] != "torch":
            raise ExportError(f"the tasks read the adopted {adopted['format']} model, which "
                              f"runs in {adopted['runtime']} and cannot be put in a torch .pt "
                              f"file; export them to FILE.onnx, which keeps its graph "
                              f"unchanged")


def torch_bytes(blob: dict[str, Any]) -> bytes:
    buf = io.BytesIO()
    torch.save(blob, buf)
    return buf.getvalue()
