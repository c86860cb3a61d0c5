"""An artifact as ONNX, through torch's torch.export-based exporter.

``torch.onnx.export(..., dynamo=True)`` captures the artifact model with torch.export
and translates it with onnxscript; torch has deprecated the TorchScript-based exporter
(``dynamo=False``) and made this one the default since 2.9. Every layer kind colonnade
builds (dense, conv1d, conv2d, batch/layer/group norm, max and average pools with any
stride, global average pooling, flatten, dropout, the five activations, and linear,
nonlinear and joint adapters) exports through it and agrees with torch in onnxruntime
(tests/test_artifact.py), so the TorchScript path is gone (see DEVELOPERS.md).

The batch dimension is dynamic; the input is named ``x`` and each task's logits are an
output named after the task. The artifact's metadata (artifact.py) is stored whole as
JSON under ``colonnade.artifact`` in the model's ``metadata_props``, with a few keys
spelled out beside it for tools that read one value.
"""

from __future__ import annotations

import contextlib
import json
import logging
import warnings
from collections.abc import Iterator
from typing import Any

import torch

from ..errors import ColonnadeError
from .standalone import ArtifactModel

__all__ = ["ONNX_OPSET", "INPUT_NAME", "onnx_bytes", "with_metadata", "read_metadata",
           "META_KEY"]

ONNX_OPSET = 18
INPUT_NAME = "x"
META_KEY = "colonnade.artifact"


class OnnxMissing(ColonnadeError):
    """The optional ONNX packages are not installed."""


@contextlib.contextmanager
def _quiet() -> Iterator[None]:
    """Silence the exporter's progress lines and notes about optional operator sets."""
    logger = logging.getLogger("torch.onnx")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield
    finally:
        logger.setLevel(level)


def _import_onnx() -> Any:
    try:
        import onnx
        import onnxscript  # noqa: F401 (the exporter needs it)
    except ImportError:
        raise OnnxMissing("ONNX export needs the onnx and onnxscript packages; install them "
                          "with pip install 'colonnade[onnx]', or export to .pt") from None
    return onnx


def _strip_traces(proto: Any) -> None:
    """Drop what the exporter notes on every node and value: the Python stack trace (paths
    of the exporting machine), FX node text and module names. They are debugging aids,
    they made up most of a small model's file, and an artifact should carry no paths."""
    for node in proto.graph.node:
        del node.metadata_props[:]
        node.doc_string = ""
    for value in (*proto.graph.value_info, *proto.graph.input, *proto.graph.output):
        del value.metadata_props[:]
    for tensor in proto.graph.initializer:
        del tensor.metadata_props[:]


def with_metadata(data: bytes, meta: dict[str, Any]) -> bytes:
    """The ONNX model ``data`` with the artifact's metadata set in ``metadata_props`` and
    the exporter's per-node traces removed."""
    onnx = _import_onnx()
    proto = onnx.load_from_string(data)
    _strip_traces(proto)
    del proto.metadata_props[:]
    props = {META_KEY: json.dumps(meta, sort_keys=True),
             "colonnade.tasks": json.dumps([t["name"] for t in meta["tasks"]]),
             "colonnade.classes": json.dumps({t["name"]: t["class_names"] or t["classes"]
                                              for t in meta["tasks"]}),
             "colonnade.input_shape": json.dumps(meta["input_shape"]),
             "colonnade.normalization": json.dumps(meta.get("normalize")),
             "colonnade.precision": meta["precision"],
             "colonnade.version": meta["colonnade"]}
    for key, value in props.items():
        entry = proto.metadata_props.add()
        entry.key, entry.value = key, value
    shape = ", ".join(map(str, meta["input_shape"]))
    proto.doc_string = (f"colonnade artifact ({meta['precision']}): logits of "
                        f"{', '.join(t['name'] for t in meta['tasks'])} for input "
                        f"{INPUT_NAME} (batch, {shape})")
    return proto.SerializeToString()


def read_metadata(data: bytes) -> dict[str, Any] | None:
    """The artifact metadata stored in an ONNX model, or None if it holds none."""
    onnx = _import_onnx()
    try:
        proto = onnx.load_from_string(data)
        props = {p.key: p.value for p in proto.metadata_props}
        meta = json.loads(props[META_KEY])
    except Exception:  # any damage means: no metadata to trust
        return None
    return meta if isinstance(meta, dict) else None


def onnx_bytes(model: ArtifactModel, input_shape: list[int], meta: dict[str, Any]) -> bytes:
    """The artifact model as ONNX (batch dimension dynamic), its metadata inside."""
    _import_onnx()
    example = torch.zeros(2, *input_shape)
    batch = torch.export.Dim("batch")
    with _quiet():
        program = torch.onnx.export(model, (example,), dynamo=True, opset_version=ONNX_OPSET,
                                    input_names=[INPUT_NAME], output_names=list(model.tasks),
                                    dynamic_shapes=({0: batch},), verbose=False)
    return with_metadata(program.model_proto.SerializeToString(), meta)
