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
           "META_KEY", "export_model", "import_onnx", "strip_traces"]

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


def import_onnx() -> Any:
    try:
        import onnx
        import onnxscript  # noqa: F401 (the exporter needs it)
    except ImportError:
        raise OnnxMissing("ONNX export needs the onnx and onnxscript packages; install them "
                          "with pip install 'colonnade[onnx]', or export to .pt") from None
    return onnx


def strip_traces(proto: Any) -> None:
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


def with_metadata(data: bytes, meta: dict[str, Any], strip: bool = True) -> bytes:
    """The ONNX model ``data`` with the artifact's metadata set in ``metadata_props`` and
    (``strip``) the exporter's per-node traces removed; an artifact holding an adopted
    ONNX graph is not stripped, so the adopted nodes stay as they were (compose.py)."""
    onnx = import_onnx()
    proto = onnx.load_from_string(data)
    if strip:
        strip_traces(proto)
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
    onnx = import_onnx()
    try:
        proto = onnx.load_from_string(data)
        props = {p.key: p.value for p in proto.metadata_props}
        meta = json.loads(props[META_KEY])
    except Exception:  # any damage means: no metadata to trust
        return None
    return meta if isinstance(meta, dict) else None


def export_model(model: torch.nn.Module, examples: tuple[torch.Tensor, ...],
                 input_names: list[str], output_names: list[str],
                 opset: int = ONNX_OPSET) -> bytes:
    """``model`` as ONNX through the torch.export-based exporter, batch dimension dynamic
    on every input; ``model.forward`` takes ``(x, *given)`` (``ArtifactModel``)."""
    import_onnx()
    batch = torch.export.Dim("batch")
    dynamic: tuple[Any, ...] = ({0: batch},)
    if len(examples) > 1:  # the varargs are one more entry, a tuple of their own
        dynamic += (tuple({0: batch} for _ in examples[1:]),)
    with _quiet():
        program = torch.onnx.export(model, examples, dynamo=True, opset_version=opset,
                                    input_names=input_names, output_names=output_names,
                                    dynamic_shapes=dynamic, verbose=False)
    return program.model_proto.SerializeToString()


def onnx_bytes(model: ArtifactModel, input_shape: list[int], meta: dict[str, Any]) -> bytes:
    """The artifact model as ONNX (batch dimension dynamic), its metadata inside."""
    data = export_model(model, (torch.zeros(2, *input_shape),), [INPUT_NAME],
                        list(model.tasks))
    return with_metadata(data, meta)
