"""Reading taps: running a user's model unchanged and collecting named intermediate outputs.

``ModuleTaps`` runs an ``nn.Module`` (the user's own, or a ``torch.export`` program made
into modules by ``torch.export.unflatten``) and reads its tap submodules' outputs through
forward hooks. A hook only reads the submodule's output and returns nothing, so the model
computes what it computed before; rewriting it with torch.fx would give a new program.

``OnnxTaps`` runs an ONNX model in onnxruntime with the taps added as extra graph
outputs: no node is added, removed or changed. onnxruntime runs on the CPU with one
intra-op and one inter-op thread and sequential execution (``ORT_SETTINGS``): its outputs
were bit-stable run to run under these settings (measured here), and the settings are
recorded in the workspace.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Callable
from typing import Any

import numpy as np
import torch
import torch.nn as nn

from ..errors import DataError, UsageError
from .layers import Shape

__all__ = ["ModuleTaps", "OnnxTaps", "ORT_SETTINGS", "nearest_names", "onnx_session"]

# onnxruntime session settings of every adopted ONNX column (and of the proof run).
ORT_SETTINGS = {"intra_op_num_threads": 1, "inter_op_num_threads": 1,
                "execution_mode": "sequential", "graph_optimization_level": "all",
                "provider": "CPUExecutionProvider"}




def nearest_names(name: str, known: list[str]) -> str:
    close = difflib.get_close_matches(name, known, n=3, cutoff=0.3) or known[:3]
    return ", ".join(close) if close else "none"



class ModuleTaps:
    """Runs an ``nn.Module`` and reads its tap submodules' outputs through forward hooks."""

    runtime = "torch"

    def __init__(self, module: nn.Module, taps: list[str]) -> None:
        named = dict(module.named_modules())
        for tap in taps:
            if tap not in named or tap == "":
                known = [n for n in named if n]
                raise UsageError(f"the model has no submodule named {tap!r}; the nearest "
                                 f"names are: {nearest_names(tap, known)}")
        self.module = module
        self.taps = list(taps)
        self._seen: dict[str, list[torch.Tensor]] = {}
        for tap in self.taps:
            named[tap].register_forward_hook(self._hook(tap))

    def _hook(self, tap: str) -> Callable[..., None]:
        def read(_module: nn.Module, _inputs: Any, output: Any) -> None:
            # A copy, read only, returning nothing: the model's own tensor flows on
            # unchanged, and a later in-place op of the model cannot alter the tap.
            self._seen.setdefault(tap, []).append(
                output.clone() if isinstance(output, torch.Tensor) else output)
        return read

    def run(self, x: torch.Tensor) -> tuple[list[torch.Tensor], torch.Tensor]:
        self._seen = {}
        try:
            logits = self.module(x)
            seen = self._seen
        finally:
            self._seen = {}
        taps = []
        for tap in self.taps:
            outs = seen.get(tap, [])
            if len(outs) == 1 and not isinstance(outs[0], torch.Tensor):
                raise UsageError(f"tap {tap!r} gives a {type(outs[0]).__name__}, not one "
                                 f"tensor; choose a submodule whose output is one tensor")
            if len(outs) != 1:
                raise UsageError(f"tap {tap!r} ran {len(outs)} times in one forward pass, not "
                                 f"once; choose a submodule that runs once per input")
            taps.append(outs[0])
        return taps, logits


def _ort_options(ort: Any) -> Any:
    options = ort.SessionOptions()
    options.intra_op_num_threads = ORT_SETTINGS["intra_op_num_threads"]
    options.inter_op_num_threads = ORT_SETTINGS["inter_op_num_threads"]
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    # Errors only: onnxruntime's C++ log would otherwise print a warning per initializer
    # of a model that lists its initializers as graph inputs (older exporters do).
    options.log_severity_level = 3
    return options


def _import_onnx() -> tuple[Any, Any]:
    try:
        import onnx
        import onnxruntime
    except ImportError:
        raise UsageError("adopting an ONNX model needs onnx and onnxruntime; install them "
                         "with 'pip install colonnade[onnx]'") from None
    return onnx, onnxruntime


class OnnxTaps:
    """Runs an ONNX model in onnxruntime, its taps added as extra graph outputs."""

    runtime = "onnxruntime"

    def __init__(self, data: bytes, taps: list[str], input_shape: Shape,
                 path: str = "model.onnx") -> None:
        onnx, ort = _import_onnx()
        try:
            model = onnx.load_from_string(data)
        except Exception:  # onnx raises several kinds for a file that is not ONNX
            model = None
        if model is not None:
            _check_self_contained(onnx, model, path)  # before the checker looks for files
        try:
            onnx.checker.check_model(model)
        except Exception:
            raise DataError(f"{path}: not a valid ONNX model; export it with "
                            f"torch.onnx.export or check the file") from None
        inits = {i.name for i in model.graph.initializer}
        inputs = [i for i in model.graph.input if i.name not in inits]
        if len(inputs) != 1 or len(model.graph.output) < 1:
            raise DataError(f"{path}: the ONNX model must take one input tensor and return "
                            f"the logits as its first output; it has {len(inputs)} inputs")
        self.input_name = inputs[0].name
        self.output_name = model.graph.output[0].name
        self.outputs = [o.name for o in model.graph.output]
        self.opset = max((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")),
                         default=None)
        _check_float(onnx, inputs[0], f"{path}: the ONNX model's input {self.input_name!r}",
                     "export it with a float32 input")
        _check_pinnable(inputs[0], input_shape, path)
        values = [o for node in model.graph.node for o in node.output if o]
        for tap in taps:
            if tap not in values:
                raise UsageError(f"the ONNX model has no value named {tap!r}; the nearest "
                                 f"names are: {nearest_names(tap, values)}")
        _check_tap_types(onnx, model, taps)
        _check_inference_mode(model, path)
        existing = {o.name for o in model.graph.output}
        for tap in taps:  # extra outputs only: no node is added, removed or changed
            if tap not in existing:
                model.graph.output.append(onnx.ValueInfoProto(name=tap))
                model.graph.output[-1].type.tensor_type.elem_type = onnx.TensorProto.FLOAT
        self.taps = list(taps)
        self.data = data
        self.tapped = model.SerializeToString()  # the file's graph plus the tap outputs
        self.session = _session(ort, self.tapped, path)
        self.version = ort.__version__

    def original(self) -> Callable[[torch.Tensor], torch.Tensor]:
        """The unmodified model alone, in a session with the same settings."""
        _, ort = _import_onnx()
        session = _session(ort, self.data, "the ONNX model")

        def run(x: torch.Tensor) -> torch.Tensor:
            feed = {self.input_name: x.detach().cpu().numpy()}
            return torch.from_numpy(session.run([self.output_name], feed)[0])
        return run

    def run(self, x: torch.Tensor) -> tuple[list[torch.Tensor], torch.Tensor]:
        feed = {self.input_name: np.ascontiguousarray(x.detach().cpu().numpy())}
        outs = self.session.run([self.output_name, *self.taps], feed)
        tensors = [torch.from_numpy(np.ascontiguousarray(o)).to(x.device) for o in outs]
        return tensors[1:], tensors[0]


def onnx_session(data: bytes, path: str) -> Any:
    """An onnxruntime session on ``data`` with the adopted column's ``ORT_SETTINGS`` (one
    thread, sequential, errors-only log), refused in one sentence if it cannot run."""
    _, ort = _import_onnx()
    return _session(ort, data, path)


def _session(ort: Any, data: bytes, path: str) -> Any:
    """An onnxruntime session with ``ORT_SETTINGS``; a model it cannot run is refused in
    one sentence with onnxruntime's own reason (an operator it does not implement, an
    operator set it does not know, types that do not fit)."""
    try:
        return ort.InferenceSession(data, _ort_options(ort), providers=[ORT_SETTINGS["provider"]])
    except Exception as exc:  # onnxruntime raises its own Fail, InvalidGraph, ... kinds
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        reason = re.sub(r"^\[ONNXRuntimeError\] : \d+ : \w+ : ", "", text)
        reason = re.sub(r"\S*onnxruntime_src\S* \S.*?\) ", "", reason)
        if len(reason) > 200:  # onnxruntime's reasons run long: whole sentences up to 200
            reason = reason[:200].rsplit(". ", 1)[0] if ". " in reason[:200] else reason[:200]
        reason = reason.rstrip(" .")
        raise DataError(f"{path}: onnxruntime {ort.__version__} cannot run this model "
                        f"({reason}); export it with operators and an operator set that "
                        f"onnxruntime's CPU provider runs") from None


def _check_self_contained(onnx: Any, model: Any, path: str) -> None:
    """The weights must be inside the file: colonnade keeps and digests that one file, so
    a model whose tensors live in separate files (ONNX external data) is refused."""
    if any(init.data_location == onnx.TensorProto.EXTERNAL for init in model.graph.initializer):
        raise DataError(f"{path}: keeps its weights in separate files (ONNX external data), "
                        f"which colonnade cannot keep with the model; save it as one file "
                        f"with onnx.save(onnx.load(PATH), NEW_PATH)")


def _check_float(onnx: Any, value: Any, what: str, fix: str) -> None:
    elem = value.type.tensor_type.elem_type
    if elem not in (0, onnx.TensorProto.FLOAT):  # 0: not known before the model runs
        name = onnx.TensorProto.DataType.Name(elem).lower() \
            if elem in onnx.TensorProto.DataType.values() else f"type {elem}"
        raise DataError(f"{what} holds {name} values, and colonnade reads float32; {fix}")


def _check_tap_types(onnx: Any, model: Any, taps: list[str]) -> None:
    """A tap must hold float32 values (a shape or an index is not a feature); types come
    from onnx.shape_inference, and a type it cannot tell is left to onnxruntime."""
    try:
        inferred = onnx.shape_inference.infer_shapes(model, strict_mode=False)
    except Exception:  # inference is a courtesy here: onnxruntime has the last word
        return
    known = {v.name: v for v in [*inferred.graph.value_info, *inferred.graph.output]}
    for tap in taps:
        if tap in known:
            _check_float(onnx, known[tap], f"tap {tap!r}", "choose a value that holds "
                         "features (a layer's output)")


def _check_inference_mode(model: Any, path: str) -> None:
    """A graph exported in training mode is refused, as a .pt2 is (model.adopted): a
    BatchNormalization with training_mode=1 normalises each batch by its own statistics
    in onnxruntime (measured: a row's output changed with its batch), so a sample's
    output would depend on the others. (A Dropout in training mode is not refused:
    onnxruntime's graph optimisation removes it, and the output was the eval model's.)"""
    for node in model.graph.node:
        if node.op_type == "BatchNormalization" and any(
                a.name == "training_mode" and a.i for a in node.attribute):
            raise DataError(f"{path}: the graph was exported in training mode "
                            f"(BatchNormalization {node.name or node.output[0]!r} with "
                            f"training_mode=1), so a sample's output would depend on its "
                            f"batch; export it again after model.eval()")


def _check_pinnable(value: Any, input_shape: Shape, path: str) -> None:
    """The input must be [batch, *input_shape]; symbolic sizes are pinned, not changed."""
    dims = value.type.tensor_type.shape.dim
    if len(dims) != 1 + len(input_shape):
        raise DataError(f"{path}: the ONNX input has {len(dims)} dimensions, but the spec's "
                        f"input {list(input_shape)} needs {1 + len(input_shape)} with the "
                        f"batch first")
    if dims[0].HasField("dim_value"):
        raise DataError(f"{path}: the ONNX input's batch dimension is fixed at "
                        f"{dims[0].dim_value}; export it with a dynamic batch axis")
    for d, want in zip(dims[1:], input_shape, strict=True):
        if d.HasField("dim_value") and d.dim_value != want:
            sizes = [d.dim_value if d.HasField("dim_value") else d.dim_param for d in dims[1:]]
            raise DataError(f"{path}: the ONNX input has sample shape {sizes}, which cannot "
                            f"be pinned to the spec's input {list(input_shape)}")
