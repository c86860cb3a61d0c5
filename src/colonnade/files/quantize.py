"""int8 artifacts: onnxruntime's static quantisation, in QDQ form, calibrated on data.

Why onnxruntime's static quantisation (``onnxruntime.quantization.quantize_static``)
rather than torch's: the artifact that ships is an ONNX file run by onnxruntime, so the
quantised graph is made and checked in the runtime that will execute it, and the QDQ
form (QuantizeLinear/DequantizeLinear pairs around float operators) is the ONNX
standard's own way of writing quantisation, which other ONNX runtimes read too. torch's
eager quantisation (``torch.ao.quantization``) is being retired in favour of the PT2E
flow, whose int8 graphs target torch's own backends and do not export to ONNX.

Settings, each measured here (benchmarks/run.py, tests/test_int8.py):

* weights int8, symmetric, one scale per output channel (``per_channel=True``): per
  tensor lost up to 0.2 accuracy points more on the digits tasks;
* activations uint8 with MinMax calibration: onnxruntime's x86 kernels fuse the QDQ pairs
  into QGemm/QLinearConv/QLinearAdd only for uint8 activations with int8 weights (its
  documentation calls this U8S8); with int8 activations (S8S8) the pairs stayed unfused
  and the int8 model ran at 0.4x the float one's speed, with uint8 at 1.3x (batch 1) to
  2.2x (batch 64) on a 12-task dense network;
* the float model is first run through onnxruntime's own pre-processing
  (``quant_pre_process``: shape inference and graph clean-up), as its documentation
  advises before quantising;
* every operator is quantised, in QDQ form: quantising only MatMul/Gemm/Conv, or
  onnxruntime's QOperator form, was no faster and no smaller on either network of
  ``benchmarks/run.py --int8-variants`` (the demo's template and a wide one);
* the quantiser's long value names are shortened and node names and intermediate shape
  annotations dropped (``short_names``): on the demo's template they were a quarter of
  the int8 file (0.34x the float file's size with them, 0.29x without).

int8 is faster only where each operator does enough work: onnxruntime's int8 kernels
cost more per call than the float ones (quantise the input, requantise the output), so
a graph of many small layers (the demo's 128-64 columns, about 2,800 multiply-
accumulates an operator per sample) runs slower in int8 at batch 1, while a wide one
(512-256, about 58,000) runs faster (README, "Figures", benchmark 5).
"""

from __future__ import annotations

import contextlib
import logging
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ColonnadeError
from .onnx_export import INPUT_NAME

__all__ = ["QUANTISATION", "CALIBRATION_BATCH", "quantize_int8", "size_breakdown",
           "QuantisationFailed", "short_names"]

CALIBRATION_BATCH = 64
QUANTISATION = {"toolkit": "onnxruntime.quantization.quantize_static", "format": "QDQ",
                "weights": "int8, symmetric, per output channel",
                "activations": "uint8, MinMax calibration"}


class QuantisationFailed(ColonnadeError):
    """onnxruntime could not quantise the model."""


@contextlib.contextmanager
def _quiet() -> Iterator[None]:
    """onnxruntime's quantiser logs advice through the root logger; keep it off stderr."""
    root = logging.getLogger()
    level = root.level
    root.setLevel(logging.ERROR)
    try:
        yield
    finally:
        root.setLevel(level)


def _reader(feeds: dict[str, np.ndarray]) -> Any:
    from onnxruntime.quantization import CalibrationDataReader

    rows = next(iter(feeds.values())).shape[0]

    class _Batches(CalibrationDataReader):
        """The calibration rows in fixed batches, once through."""

        def __init__(self) -> None:
            self._it = iter([{k: v[i:i + CALIBRATION_BATCH] for k, v in feeds.items()}
                             for i in range(0, rows, CALIBRATION_BATCH)])

        def get_next(self) -> dict[str, np.ndarray] | None:
            return next(self._it, None)

    return _Batches()


def quantize_int8(float_model: bytes, calibration: np.ndarray | dict[str, np.ndarray],
                  ) -> bytes:
    """The float ONNX model quantised to int8 (QDQ), calibrated on ``calibration`` rows
    (the input ``x``, or feeds by input name for a model of several inputs)."""
    try:
        from onnxruntime.quantization import QuantFormat, QuantType, quantize_static
        from onnxruntime.quantization.shape_inference import quant_pre_process
    except ImportError:
        raise QuantisationFailed("int8 export needs onnxruntime; install it with pip install "
                                 "'colonnade[onnx]'") from None
    feeds = calibration if isinstance(calibration, dict) else {INPUT_NAME: calibration}
    feeds = {k: np.ascontiguousarray(v, dtype=np.float32) for k, v in feeds.items()}
    with tempfile.TemporaryDirectory(prefix="colonnade-int8-") as tmp, _quiet():
        src, pre, out = (Path(tmp) / n for n in ("float.onnx", "pre.onnx", "int8.onnx"))
        src.write_bytes(float_model)
        try:
            quant_pre_process(str(src), str(pre))
            quantize_static(str(pre), str(out), _reader(feeds), quant_format=QuantFormat.QDQ,
                            per_channel=True, activation_type=QuantType.QUInt8,
                            weight_type=QuantType.QInt8)
        except Exception as exc:  # onnxruntime raises many kinds; name it in one sentence
            raise QuantisationFailed(f"onnxruntime could not quantise the model "
                                     f"({type(exc).__name__}: {str(exc).splitlines()[0]}); "
                                     f"export without --int8") from None
        return short_names(out.read_bytes())


def short_names(data: bytes) -> bytes:
    """The model with every internal value renamed ``_0``, ``_1``, ... and node names and
    intermediate shape annotations (``value_info``) cleared: the graph's inputs and
    outputs keep their names; no operator, attribute or tensor changes.

    The quantiser names each value after the ones it came from (``..._QuantizeLinear_
    Output``, ``..._zero_point``), so in a QDQ graph of many small layers the names
    made up a quarter of the file (426 kB of 1.78 MB on the demo's template grown to 12
    tasks, benchmarks/shipping.py). ONNX asks only that value names be unique and lets
    node names be empty. Names starting with ``_`` cannot clash with a task name, which
    starts with a letter.
    """
    import onnx

    proto = onnx.load_from_string(data)
    graph = proto.graph
    for node in graph.node:
        if any(a.type in (onnx.AttributeProto.GRAPH, onnx.AttributeProto.GRAPHS)
               for a in node.attribute):
            return data  # subgraphs see outer names: leave such a model as it is
    keep = {v.name for v in (*graph.input, *graph.output)}
    names: dict[str, str] = {}

    def short(name: str) -> str:
        if not name or name in keep:
            return name
        return names.setdefault(name, f"_{len(names):x}")

    for node in graph.node:
        node.name = ""
        node.input[:] = [short(n) for n in node.input]
        node.output[:] = [short(n) for n in node.output]
    for item in graph.initializer:
        item.name = short(item.name)
    # Shapes of intermediate values, which the pre-processing's shape inference wrote in:
    # an annotation that onnxruntime infers again when it loads the file.
    del graph.value_info[:]
    return proto.SerializeToString()


def _roles(graph: object) -> dict[str, str]:
    """Quantisation parameters by the place they are read: input 1 of a QuantizeLinear or
    DequantizeLinear is a scale, input 2 a zero point (the ONNX operators' definition)."""
    roles: dict[str, str] = {}
    for node in graph.node:
        if node.op_type in ("QuantizeLinear", "DequantizeLinear"):
            for position, role in ((1, "scales"), (2, "zero_points")):
                if len(node.input) > position and node.input[position]:
                    roles[node.input[position]] = role
    return roles


def size_breakdown(data: bytes) -> dict[str, int]:
    """Bytes of an ONNX file by what they hold: int8 weights, int32 biases, quantisation
    scales and zero points (by where QuantizeLinear/DequantizeLinear read them), float
    tensors left unquantised, and the rest (graph, names, metadata)."""
    import onnx

    proto = onnx.load_from_string(data)
    out = {"file": len(data), "int8_weights": 0, "int32_biases": 0, "scales": 0,
           "zero_points": 0, "float_tensors": 0, "other_tensors": 0}
    tensors = list(proto.graph.initializer)
    roles = _roles(proto.graph)
    for node in proto.graph.node:
        tensors += [(a.t, node.output[0]) for a in node.attribute
                    if a.type == onnx.AttributeProto.TENSOR]
    for item in tensors:
        t, name = item if isinstance(item, tuple) else (item, item.name)
        size = len(onnx.numpy_helper.to_array(t).tobytes())
        if name in roles:
            out[roles[name]] += size
        elif t.data_type == onnx.TensorProto.INT8:
            out["int8_weights"] += size
        elif t.data_type == onnx.TensorProto.INT32:
            out["int32_biases"] += size
        elif t.data_type == onnx.TensorProto.FLOAT:
            out["float_tensors"] += size
        else:
            out["other_tensors"] += size
    out["graph_and_metadata"] = len(data) - sum(v for k, v in out.items() if k != "file")
    return out
