"""Ship one task alone: a standalone .pt (torch only) or .onnx file of the task's closure.

The standalone model holds the task's closure and nothing else: the columns, the live
adapters between them (trimmed adapters are gone) and the head, under the grown
network's own ``state_dict`` keys, so its closure digest equals the seal's. Its
architecture is plain data naming torch layers (see standalone.py, which rebuilds it
with torch alone). Adapter kinds beyond linear and nonlinear can take part by giving
their module a method ``export_steps()`` that returns ``[(op, name), ...]`` with ``op``
either ``"scale"`` (multiply by the scalar parameter ``name``) or ``"module"`` (apply
the child module ``name``), applied in order.

ONNX files come from torch's TorchScript-based exporter (``dynamo=False``); the
torch.export-based one needs onnxscript, which colonnade does not depend on.
"""

from __future__ import annotations

import io
import json
import warnings
from typing import Any

import torch
import torch.nn as nn

from .._version import __version__
from ..clock import now
from ..errors import ColonnadeError, SealedError, UsageError
from ..model.adapters import JointAdapter, LinearAdapter, NonlinearAdapter
from ..model.digest import closure_digests
from ..model.guard import closure_definition
from ..model.network import ProgressiveNet
from ..model.parts import CLOSURE_DEFINITION
from .standalone import FORMAT, LAYERS, VERSION, TaskModel

__all__ = ["ExportError", "describe_layer", "task_architecture", "standalone_state",
           "standalone_blob", "standalone_model", "torch_bytes", "onnx_bytes",
           "ONNX_OPSET"]

ONNX_OPSET = 17


class ExportError(ColonnadeError):
    """The task holds a part that the standalone format cannot describe."""


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
        raise ExportError(f"layer {name} cannot be exported to a standalone file; the "
                          f"format knows {', '.join(sorted(LAYERS))}")
    args = {a: _plain(getattr(module, a)) for a in _ARGS.get(name, ())}
    if name in ("Linear", "Conv1d", "Conv2d"):
        args["bias"] = module.bias is not None
    if name == "LayerNorm":
        args["bias"] = getattr(module, "bias", None) is not None
    return {"type": name, "args": args}


def _adapter_steps(key: str, module: nn.Module) -> list[dict[str, Any]]:
    if type(module) is LinearAdapter:
        order = [("module", "U")]
    elif type(module) is NonlinearAdapter:
        order = [("scale", "alpha"), ("module", "V"), ("module", "act"), ("module", "U")]
    elif type(module) is JointAdapter:
        order = [("module", "V"), ("module", "U")]
    elif callable(getattr(module, "export_steps", None)):
        order = list(module.export_steps())
    else:
        raise ExportError(f"adapter {key} of kind {type(module).__name__} cannot be exported; "
                          f"give it an export_steps() method (see export.py)")
    steps = []
    for op, name in order:
        if op == "scale":
            steps.append({"op": "scale", "name": name,
                          "shape": list(getattr(module, name).shape)})
        else:
            steps.append({"op": "module", "name": name,
                          "layer": describe_layer(getattr(module, name))})
    return steps


def task_architecture(net: ProgressiveNet, task: str) -> dict[str, Any]:
    """The closure of ``task`` as plain data: columns, live adapters in order, head."""
    closure = net.closure(task)
    columns, adapters = [], []
    for k in closure.columns:
        col = net.columns[k]
        blocks = list(col.blocks)[:closure.depth(k)]  # only the blocks the task runs
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
                                 "steps": _adapter_steps(key, net.adapters[key])})
    for key, _ in net.adapters_into_head(task):
        adapters.append({"key": key, "sources": list(net.adapter_sources(key)),
                         "column": None, "block": None, "head": task,
                         "steps": _adapter_steps(key, net.adapters[key])})
    arch = {"task": task, "columns": columns, "adapters": adapters,
            "head": describe_layer(net.heads[task]), "head_column": net.task(task).column}
    if net.normalization is not None:  # the buffers' shape; their values are in the state
        arch["input_norm"] = list(net.input_norm.mean.shape)
    return arch


def standalone_state(net: ProgressiveNet, task: str) -> dict[str, torch.Tensor]:
    """Own copies (CPU, contiguous) of the closure's tensors, so no other bytes ride along."""
    return {k: v.detach().cpu().clone().contiguous()
            for k, v in net.closure_state(task).items()}


def _seal_of(net: ProgressiveNet, task: str) -> dict[str, Any] | None:
    """The task's newest active seal as recorded in ``net.meta``, read defensively."""
    seals = net.meta.get("seals")
    versions = seals.get(task) if isinstance(seals, dict) else None
    if not isinstance(versions, list) or not versions or not isinstance(versions[-1], dict):
        return None
    entry = versions[-1]
    if entry.get("unsealed"):
        return None
    closure = entry.get("closure") if isinstance(entry.get("closure"), dict) else {}
    return {"version": entry.get("version"), "time": entry.get("time"),
            "closure_sha256": closure.get("sha256"), "entry_sha256": entry.get("entry_sha256")}


def standalone_blob(net: ProgressiveNet, task: str) -> dict[str, Any]:
    """The dictionary a standalone .pt file holds (see standalone.py)."""
    info = net.task(task)
    if info.state != "live":
        raise UsageError(f"task {task!r} is retired, so it is no longer exported")
    state = standalone_state(net, task)
    digest, _ = closure_digests(state)
    seal = _seal_of(net, task)
    sealed_digest = digest
    definition = closure_definition(net.meta["seals"][task][-1]) if seal is not None else None
    if seal is not None and definition != CLOSURE_DEFINITION:
        # A seal made under another closure definition is compared by its own; the file
        # still ships only what the task runs.
        try:
            sealed_digest, _ = closure_digests(net.closure_state(task, definition))
        except ColonnadeError:
            sealed_digest = None
    if seal is not None and seal["closure_sha256"] not in (None, sealed_digest):
        raise SealedError(f"task {task!r} no longer matches its seal v{seal['version']}; "
                          f"run 'colonnade check' on the workspace before exporting")
    dtypes = sorted({str(t.dtype).removeprefix("torch.") for t in state.values()
                     if t.is_floating_point()})
    return {
        "format": FORMAT,
        "version": VERSION,
        "task": task,
        "classes": info.classes,
        "class_names": info.class_names,
        "normalization": net.normalization,
        "input_shape": list(net.input_shape),
        "architecture": task_architecture(net, task),
        "state": state,
        "meta": {"closure_sha256": digest, "seal": seal, "spec": net.spec.name,
                 "dtype": ",".join(dtypes), "exported": now(), "colonnade": __version__,
                 "torch": str(torch.__version__)},  # TorchVersion is not plain data
    }


def standalone_model(blob: dict[str, Any]) -> TaskModel:
    model = TaskModel(blob["architecture"])
    model.load_state_dict(blob["state"], strict=True)
    return model.requires_grad_(False).eval()


def torch_bytes(blob: dict[str, Any]) -> bytes:
    buf = io.BytesIO()
    torch.save(blob, buf)
    return buf.getvalue()


def onnx_bytes(blob: dict[str, Any]) -> bytes:
    """The standalone model as ONNX, batch dimension dynamic, metadata in metadata_props."""
    try:
        import onnx
    except ImportError:
        raise ExportError("ONNX export needs the onnx package; install it with "
                          "pip install 'colonnade[onnx]', or export to .pt") from None

    model = standalone_model(blob)
    example = torch.zeros(2, *blob["input_shape"])
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the TorchScript exporter warns that it is legacy
        torch.onnx.export(model, (example,), buf, dynamo=False, opset_version=ONNX_OPSET,
                          input_names=["x"], output_names=["logits"],
                          dynamic_axes={"x": {0: "batch"}, "logits": {0: "batch"}})
    proto = onnx.load_from_string(buf.getvalue())
    meta = blob["meta"]
    props = {"colonnade.task": blob["task"], "colonnade.classes": str(blob["classes"]),
             "colonnade.class_names": json.dumps(blob.get("class_names")),
             "colonnade.normalization": json.dumps(blob.get("normalization")),
             "colonnade.input_shape": json.dumps(blob["input_shape"]),
             "colonnade.closure_sha256": meta["closure_sha256"],
             "colonnade.seal": json.dumps(meta["seal"]),
             "colonnade.version": meta["colonnade"], "colonnade.exported": meta["exported"]}
    for key, value in props.items():
        entry = proto.metadata_props.add()
        entry.key, entry.value = key, value
    proto.doc_string = f"colonnade task {blob['task']!r}: logits for input (batch, " \
                       f"{', '.join(map(str, blob['input_shape']))})"
    return proto.SerializeToString()
