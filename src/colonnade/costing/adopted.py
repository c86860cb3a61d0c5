"""What an adopted column costs: parameters and MACs of a model colonnade did not build.

An adopted model is not made of the template's layers, so its figures come from the
model itself, each from a named source:

* torch models (a Python module or a ``.pt2`` program): MACs are counted by
  ``torch.utils.flop_counter.FlopCounterMode`` over one forward pass of one zero sample
  (FLOPs / 2; it counts matrix products and convolutions, the same rule as ``costs.py``);
  parameters are the ``numel`` of the module's parameters.
* ONNX models: MACs are counted from the graph's shapes after ``onnx.shape_inference``
  (with data propagation) with the batch pinned to 1, and for a value whose shape it
  cannot tell (a Reshape to a size computed from the input's Shape), from one onnxruntime
  run of that pinned graph on zeros: Conv (output elements x input channels per group x kernel
  elements), Gemm (M x N x K) and MatMul (output elements x the reduced dimension); every
  other operator counts none, as FlopCounterMode does. Parameters are the elements of
  the graph's floating-point initializers.

Figures are computed once per column and kept on it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch.utils.flop_counter import FlopCounterMode

from ..model.adopted import AdoptedColumn
from ..model.taps import onnx_session

__all__ = ["AdoptedCost", "adopted_cost", "onnx_graph_macs"]

SOURCES = {"torch": "torch.utils.flop_counter.FlopCounterMode (one forward pass, batch 1)",
           "onnxruntime": "the ONNX graph's shapes (onnx.shape_inference, batch 1)"}


@dataclass(frozen=True)
class AdoptedCost:
    """Per-sample MACs and parameter count of an adopted column, and where they come from."""

    macs: int
    params: int
    source: str


def _torch_cost(column: AdoptedColumn) -> tuple[int, int]:
    x = torch.zeros(1, *column.record.input)
    counter = FlopCounterMode(display=False)
    with counter, torch.no_grad():
        column(x)
    module = column._runner[0].module
    return counter.get_total_flops() // 2, sum(p.numel() for p in module.parameters())


def _pinned(model: Any, input_shape: tuple[int, ...]) -> Any:
    """A copy of the model with its input's sizes fixed: batch 1, then the sample shape."""
    import onnx

    pinned = onnx.ModelProto()
    pinned.CopyFrom(model)
    inits = {i.name for i in pinned.graph.initializer}
    value = next(i for i in pinned.graph.input if i.name not in inits)
    for dim, size in zip(value.type.tensor_type.shape.dim, (1, *input_shape), strict=True):
        dim.Clear()
        dim.dim_value = size
    return onnx.shape_inference.infer_shapes(pinned, strict_mode=False, data_prop=True)


def _measured(model: Any, names: list[str]) -> dict[str, list[int]]:
    """Shapes shape inference could not tell (a Reshape to a size computed from the
    input's Shape, say), read from one onnxruntime run of the pinned model on zeros."""
    import onnx

    probe = onnx.ModelProto()
    probe.CopyFrom(model)
    types = {v.name: v.type.tensor_type.elem_type for v in probe.graph.value_info}
    listed = {o.name for o in probe.graph.output}
    for name in names:
        if name not in listed:
            probe.graph.output.append(onnx.ValueInfoProto(name=name))
            probe.graph.output[-1].type.tensor_type.elem_type = \
                types.get(name) or onnx.TensorProto.FLOAT
    inits = {i.name for i in probe.graph.initializer}
    value = next(i for i in probe.graph.input if i.name not in inits)
    dims = [d.dim_value for d in value.type.tensor_type.shape.dim]
    session = onnx_session(probe.SerializeToString(), "the ONNX model")
    outs = session.run(names, {value.name: np.zeros(dims, np.float32)})
    return {name: list(out.shape) for name, out in zip(names, outs, strict=True)}


def onnx_graph_macs(data: bytes, input_shape: tuple[int, ...]) -> tuple[int, int]:
    """MACs for one sample and floating-point parameters of an ONNX model (module doc)."""
    import onnx
    from onnx import numpy_helper

    model = _pinned(onnx.load_from_string(data), tuple(input_shape))
    shapes: dict[str, list[int]] = {}
    for value in [*model.graph.input, *model.graph.value_info, *model.graph.output]:
        typed = value.type.tensor_type
        # A value without a shape field has an unknown rank, not the shape [] of a scalar.
        if typed.HasField("shape") and all(d.HasField("dim_value") for d in typed.shape.dim):
            shapes[value.name] = [d.dim_value for d in typed.shape.dim]
    params = 0
    for init in model.graph.initializer:
        shapes[init.name] = list(init.dims)
        if numpy_helper.to_array(init).dtype.kind == "f":
            params += math.prod(init.dims)
    counted = [n for n in model.graph.node if n.op_type in ("Conv", "Gemm", "MatMul")]
    unknown = sorted({name for n in counted for name in (n.input[0], n.input[1], n.output[0])
                      if name not in shapes})
    if unknown:
        shapes.update(_measured(model, unknown))
    macs = 0
    for node in model.graph.node:
        if node.op_type == "Conv":
            out, weight = shapes[node.output[0]], shapes[node.input[1]]
            macs += math.prod(out) * math.prod(weight[1:])
        elif node.op_type == "Gemm":
            a = shapes[node.input[0]]
            trans_a = any(x.name == "transA" and x.i for x in node.attribute)
            m, k = (a[1], a[0]) if trans_a else (a[0], a[1])
            macs += m * k * shapes[node.output[0]][-1]
        elif node.op_type == "MatMul":
            macs += math.prod(shapes[node.output[0]]) * shapes[node.input[0]][-1]
    return macs, params


def adopted_cost(column: AdoptedColumn) -> AdoptedCost:
    """The column's cost, computed once (see the module docstring for the sources)."""
    cached = getattr(column, "_cost", None)
    if cached is None:
        if column.record.runtime == "onnxruntime":
            macs, params = onnx_graph_macs(column.data or b"", tuple(column.record.input))
        else:
            macs, params = _torch_cost(column)
        cached = AdoptedCost(int(macs), int(params), SOURCES[column.record.runtime])
        column._cost = cached
    return cached
