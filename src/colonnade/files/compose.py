"""An artifact over an adopted ONNX model: its original graph, unchanged, plus the new parts.

An adopted column is never converted (DESIGN invariant 11), so an artifact whose tasks
read an adopted ONNX model is not exported from torch as a whole. It is composed:

1. the new parts (columns, adapters, heads) are exported from torch as a model of their
   own, ``new(x, given_0, ..., given_n)``, whose extra inputs are the adopted column's
   outputs ``[tap_1, ..., tap_n, logits]`` (``ArtifactModel`` with a given column);
2. every name in that model is prefixed ``colonnade/``, except its inputs, which are
   renamed to the values they stand for: ``x`` stays the artifact's input, ``given_i``
   becomes the adopted graph's own tap value (or its logits output);
3. the adopted graph's nodes, initializers and value infos are copied over as they are,
   byte for byte, and the new parts' nodes are appended after them. The new parts read the
   taps as the existing values they are: no node of the adopted graph is added to,
   removed or changed. Two Identity nodes may be added around it: ``x`` into the adopted
   graph's own input name (when that is not ``x``) and the adopted logits out to the
   adopted task's output name.

The whole file keeps the adopted model's operator set, because raising it could change
what the adopted nodes mean: the new parts are exported at that version when it is 18
(torch's exporter's own) or later, else at 18 and converted down by onnx's version
converter. The IR version is the newer of the two. onnx's checker validates the result,
and the tests compare the adopted nodes' protos and run the file against the adopted
model alone in onnxruntime (tests/test_adopted_export.py).

int8: only the new parts are quantised (files/quantize.py, calibrated on the artifact's
calibration rows and the adopted model's tap values for them); the adopted nodes stay in
float, exactly as certified.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import numpy as np
import torch

from ..model.adopted import AdoptedColumn
from ..model.network import ProgressiveNet
from .artifact import ExportError, artifact_model
from .onnx_export import (
    INPUT_NAME,
    ONNX_OPSET,
    export_model,
    import_onnx,
    onnx_bytes,
    strip_traces,
    with_metadata,
)
from .quantize import CALIBRATION_BATCH, quantize_int8
from .standalone import ArtifactModel

__all__ = ["PREFIX", "compose_adopted", "adopted_node_protos", "given_names", "onnx_artifact"]

PREFIX = "colonnade/"
# Reductions whose axes became an input, with the attribute noop_with_empty_axes, in 18.
_REDUCE_18 = {"ReduceMean", "ReduceMax", "ReduceMin", "ReduceProd", "ReduceL1", "ReduceL2",
              "ReduceLogSum", "ReduceLogSumExp", "ReduceSumSquare"}


def given_names(count: int) -> list[str]:
    """Input names of the new parts for the adopted column's outputs."""
    return [f"given_{i}" for i in range(count)]


def _default_opset(proto: Any) -> int:
    versions = [o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")]
    if not versions:
        raise ExportError("the adopted ONNX model imports no standard operator set; it "
                          "cannot be composed with the new parts")
    return int(versions[0])


def _values(graph: Any) -> set[str]:
    names = {i.name for i in graph.input} | {i.name for i in graph.initializer}
    names |= {o for n in graph.node for o in n.output}
    return names


def adopted_node_protos(data: bytes, names: set[str] | None = None) -> list[bytes]:
    """The serialised nodes of an ONNX model (for comparing graphs node by node)."""
    onnx = import_onnx()
    return [n.SerializeToString() for n in onnx.load_from_string(data).graph.node
            if names is None or n.name in names]


def _rename(graph: Any, names: dict[str, str]) -> None:
    """Prefix every name of ``graph`` with PREFIX, or rename it as ``names`` says."""
    def new(name: str) -> str:
        return name if not name else names.get(name, PREFIX + name)

    for i, node in enumerate(graph.node):
        node.name = PREFIX + (node.name or f"_{i:x}")  # named, so it is told apart
        node.input[:] = [new(n) for n in node.input]
        node.output[:] = [new(n) for n in node.output]
        for attr in node.attribute:
            if attr.g.node or attr.graphs:
                raise ExportError("the new parts' ONNX graph holds a subgraph, which the "
                                  "composition does not rename; export without the adopted "
                                  "column")
    for group in (graph.initializer, graph.input, graph.output, graph.value_info):
        for item in group:
            item.name = new(item.name)


def _merged_opsets(onnx: Any, a: Any, b: Any) -> list[Any]:
    versions: dict[str, int] = {}
    for proto in (a, b):
        for o in proto.opset_import:
            domain = "" if o.domain == "ai.onnx" else o.domain
            if domain in versions and versions[domain] != o.version:
                raise ExportError(f"the adopted ONNX model uses operator set {domain or 'ai.onnx'} "
                                  f"version {versions[domain]}, the new parts version "
                                  f"{o.version}; they cannot share one file")
            versions[domain] = o.version
    return [onnx.helper.make_opsetid(d, v) for d, v in versions.items()]


def _converted(onnx: Any, data: bytes, opset: int) -> bytes:
    """The new parts in an older operator set, by onnx's own version converter (run on
    the exported, constant-folded graph, where it finds every axes input it needs)."""
    try:
        proto = onnx.version_converter.convert_version(onnx.load_from_string(data), opset)
    except Exception:  # the converter raises several kinds; one sentence
        raise ExportError(f"the new parts cannot be written in operator set {opset}, the "
                          f"adopted ONNX model's (onnx's version converter has no way down "
                          f"for one of their operators); re-export the adopted model at "
                          f"opset {ONNX_OPSET} or later, adopt that file, and grow again"
                          ) from None
    for node in proto.graph.node:  # the converter keeps an attribute opset 18 introduced
        if node.op_type in _REDUCE_18 and opset < 18:
            kept = [a for a in node.attribute if a.name != "noop_with_empty_axes" or a.i != 0]
            del node.attribute[:]
            node.attribute.extend(kept)  # 0 was the only behaviour before 18
    return proto.SerializeToString()


def compose_adopted(adopted: bytes, taps: list[str], model: ArtifactModel,
                    input_shape: list[int], given_shapes: list[list[int]],
                    quantize: Callable[[bytes, dict[str, np.ndarray]], bytes] | None = None,
                    calibration: dict[str, np.ndarray] | None = None) -> bytes:
    """The adopted ONNX graph, unchanged, and ``model``'s new parts reading its taps.

    ``model`` takes ``x`` and the adopted column's outputs (shapes ``given_shapes``, taps
    then logits); ``quantize`` (with ``calibration``: feeds by input name) makes the new
    parts int8 before they are joined to the float adopted graph.
    """
    onnx = import_onnx()
    orig = onnx.load_from_string(adopted)
    graph = orig.graph
    inits = {i.name for i in graph.initializer}
    inputs = [i for i in graph.input if i.name not in inits]
    if len(inputs) != 1 or not graph.output:
        raise ExportError("the adopted ONNX model must take one input and return its logits "
                          "first; it cannot be composed with the new parts")
    adopted_input, logits = inputs[0].name, graph.output[0].name
    existing = _values(graph)
    clash = [t for t in (*model.tasks, INPUT_NAME) if t in existing
             and not (t == INPUT_NAME and t == adopted_input)]
    if clash:
        raise ExportError(f"the adopted ONNX model already has a value named {clash[0]!r}, "
                          f"which the artifact needs as an input or task output name; rename "
                          f"the task")
    given = given_names(len(given_shapes))
    examples = (torch.zeros(2, *input_shape), *(torch.zeros(2, *s) for s in given_shapes))
    opset = _default_opset(orig)
    part = export_model(model, examples, [INPUT_NAME, *given], list(model.tasks),
                        max(opset, ONNX_OPSET))
    if opset < ONNX_OPSET:
        part = _converted(onnx, part, opset)
    if quantize is not None:
        part = quantize(part, calibration or {})
    new = onnx.load_from_string(part)
    strip_traces(new)
    if new.functions:
        new = onnx.inliner.inline_local_functions(new)
    mapping = {INPUT_NAME: INPUT_NAME, **dict(zip(given, [*taps, logits], strict=True))}
    mapping.update({t: t for t in model.tasks})
    _rename(new.graph, mapping)

    out = onnx.ModelProto()
    out.CopyFrom(orig)  # the adopted model whole: its nodes, initializers, value infos
    body = out.graph
    del body.input[:]
    del body.output[:]
    entry = onnx.ValueInfoProto()
    entry.CopyFrom(inputs[0])
    entry.name = INPUT_NAME
    body.input.append(entry)
    body.input.extend(i for i in graph.input if i.name in inits)  # initializers as inputs
    if adopted_input != INPUT_NAME:
        body.node.insert(0, onnx.helper.make_node("Identity", [INPUT_NAME], [adopted_input],
                                                  name=PREFIX + "input"))
    for node in new.graph.node:
        body.node.append(node)
    body.initializer.extend(new.graph.initializer)
    body.value_info.extend(v for v in new.graph.value_info if v.name not in existing)
    produced = {o for n in body.node for o in n.output}
    for o in new.graph.output:
        if o.name not in produced:  # an output that is a given value passed through
            source = next(i.name for i in new.graph.input if i.name == o.name)
            body.node.append(onnx.helper.make_node("Identity", [source], [o.name],
                                                   name=PREFIX + "out_" + o.name))
        body.output.append(o)
    del out.opset_import[:]
    out.opset_import.extend(_merged_opsets(onnx, orig, new))
    out.ir_version = max(orig.ir_version, new.ir_version)
    out.functions.extend(new.functions)
    try:
        onnx.checker.check_model(out)
    except Exception as exc:  # onnx raises several kinds; one sentence
        raise ExportError(f"the composed ONNX model does not pass onnx's checker "
                          f"({str(exc).splitlines()[0][:200]})") from None
    return out.SerializeToString()


def _adopted_outputs(column: AdoptedColumn, rows: np.ndarray) -> list[np.ndarray]:
    """The adopted column's outputs ``[tap_1, ..., tap_n, logits]`` on ``rows``, in the
    runtime it was certified in, a fixed batch at a time."""
    parts: list[list[np.ndarray]] = []
    with torch.no_grad():
        for i in range(0, rows.shape[0], CALIBRATION_BATCH):
            outs = column(torch.from_numpy(rows[i:i + CALIBRATION_BATCH]))
            parts.append([o.detach().cpu().numpy() for o in outs])
    return [np.concatenate(p) for p in zip(*parts, strict=True)]


def onnx_artifact(net: ProgressiveNet, blob: dict[str, Any], meta: dict[str, Any],
                  calibration: np.ndarray | None = None) -> bytes:
    """The artifact ``blob`` as ONNX, int8 when ``calibration`` rows are given.

    Without an adopted column in it: torch's export of the whole model. With an adopted
    torch model (a module or a .pt2 program): the same, the adopted column included. With
    an adopted ONNX model: its graph unchanged, composed with the new parts (above).
    """
    adopted = next((c["adopted"] for c in blob["architecture"]["columns"]
                    if "adopted" in c), None)
    shape = list(net.input_shape)
    if adopted is None or adopted["runtime"] == "torch":
        column = copy.deepcopy(net.adopted) if adopted is not None else None
        data = onnx_bytes(artifact_model(blob, column), shape, meta)
        if calibration is not None:
            data = with_metadata(quantize_int8(data, calibration), meta)
        return data
    column = net.adopted
    feeds = None
    if calibration is not None:
        names = given_names(adopted["outputs"])
        feeds = {INPUT_NAME: calibration,
                 **dict(zip(names, _adopted_outputs(column, calibration), strict=True))}
    given = [*adopted["tap_shapes"], [adopted["classes"]]]
    data = compose_adopted(column.data, list(adopted["taps"]), artifact_model(blob), shape,
                           given, quantize_int8 if calibration is not None else None, feeds)
    return with_metadata(data, meta, strip=False)
