"""Adopted columns: a model the user already has, frozen as column 0 and run as certified.

An adopted column is never converted, retrained or approximated (DESIGN invariant 11):
it runs the user's own ``nn.Module``, the ``torch.export`` program they saved, or their
ONNX model in onnxruntime, exactly as it stands. What colonnade adds is read-only: the
outputs of named intermediate values (*taps*), which later columns read through lateral
adapters (``model.bridges``).

* ``nn.Module`` and ``.pt2``: taps are submodule names (as in ``named_modules()``),
  read by forward hooks (``model.taps.ModuleTaps``). A ``.pt2`` program is read by
  ``model.exported`` (no pickle) and run through ``torch.export.unflatten``, which keeps
  its submodules and their names.
* ``.onnx``: taps are names of graph values, added as extra graph outputs and run by
  onnxruntime with fixed settings (``model.taps.OnnxTaps``).

The column's outputs are ``[tap_1, ..., tap_n, logits]``: one entry per tap, in order,
then the model's own output, which is the adopted task's logits.
"""

from __future__ import annotations

import copy
import hashlib
import math
import warnings
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
import torch.nn as nn

from ..errors import DataError, SpecError, UsageError
from .budget import check_activation
from .exported import load_exported_program
from .layers import BlockPlan, ColumnPlan, Shape
from .schema import MAX_SIZE
from .taps import ORT_SETTINGS, ModuleTaps, OnnxTaps

__all__ = ["ADOPTED_FILE", "AdoptedColumn", "AdoptedRecord", "adopt_module", "adopt_exported",
           "adopt_onnx", "rebuild_adopted"]

# The workspace file that keeps an adopted model file's bytes, unchanged, as one uint8
# tensor ``model``: the store writes, digests and reads it like every tensor file.
ADOPTED_FILE = "adopted.safetensors"


@dataclass
class AdoptedRecord:
    """What the manifest keeps about an adopted model; enough to rebuild the column."""

    format: str  # "module" (a Python nn.Module), "pt2" (torch.export) or "onnx"
    runtime: str  # "torch" or "onnxruntime"
    runtime_version: str
    taps: list[str]
    tap_shapes: list[list[int]]
    classes: int
    input: list[int]
    sha256: str | None = None  # of the model file, for pt2 and onnx
    file_bytes: int | None = None
    settings: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


# ----------------------------------------------------------------------------- the column
class AdoptedColumn(nn.Module):
    """Column 0 made of a frozen model of the user's: outputs ``[tap_1..tap_n, logits]``.

    For a Python module the model is a submodule, so its tensors are in the network's
    ``state_dict`` (saved, digested and sealed like any column's). For a file (``.pt2``,
    ``.onnx``) the file itself is the model: the buffer ``model_sha256`` holds its
    SHA-256, so a seal's closure digest covers the exact file, and the file's bytes are
    kept in the workspace beside the weights.
    """

    def __init__(self, runner: ModuleTaps | OnnxTaps, record: AdoptedRecord,
                 data: bytes | None = None) -> None:
        super().__init__()
        self.record = record
        self.data = data
        if record.format == "module":
            self.model = runner.module
            self._runner = [runner]
        else:
            self.model = None
            self._runner = [runner]  # a list, so nn.Module does not adopt the runner
            digest = bytes.fromhex(record.sha256 or "")
            self.register_buffer("model_sha256",
                                 torch.tensor(list(digest), dtype=torch.uint8))
            self.register_load_state_dict_post_hook(_same_file)
        shapes = [tuple(s) for s in record.tap_shapes] + [(record.classes,)]
        inp = tuple(record.input)
        blocks = tuple(BlockPlan(None, (), inp, s, s, -1) for s in shapes)
        self.plan = ColumnPlan((), inp, blocks)
        self.blocks = tuple(range(len(shapes)))  # one output per tap, then the logits
        self.width = 1.0
        self.train(False)

    def file_matches(self) -> bool:
        """Whether the digest in the state (what seals cover) is that of the file that runs."""
        if self.data is None:
            return True
        stored = bytes(self.model_sha256.detach().cpu().tolist())
        return stored == hashlib.sha256(self.data).digest()

    def attachment(self) -> dict[str, torch.Tensor]:
        """The model file's bytes as the workspace keeps them (``ADOPTED_FILE``)."""
        if self.data is None:
            return {}
        return {"model": torch.frombuffer(bytearray(self.data), dtype=torch.uint8)}

    @property
    def taps(self) -> list[str]:
        return list(self.record.taps)

    @property
    def out_features(self) -> int:
        return self.record.classes

    def train(self, mode: bool = True) -> AdoptedColumn:
        """Always eval: an adopted model's norms and dropout never move (invariant 2)."""
        self.training = False
        for module in self.children():
            module.train(False)
        return self

    def __deepcopy__(self, memo: dict[int, Any]) -> AdoptedColumn:
        """A Python module is copied with its hooks; a file's runner is shared.

        Neither a torch.export program made into modules nor an onnxruntime session can
        be deep-copied, and neither is in the module tree, so nothing done to the copy
        (such as re-initialising its parts) can reach them.
        """
        if self.model is not None:
            runner = ModuleTaps(copy.deepcopy(self.model, memo), self.record.taps)
            clone = AdoptedColumn(runner, self.record, self.data)
            memo[id(self)] = clone
            return clone
        clone = AdoptedColumn.__new__(AdoptedColumn)
        clone.__dict__ = {k: (v.copy() if isinstance(v, dict) else v)
                          for k, v in self.__dict__.items()}
        memo[id(self)] = clone
        return clone

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        taps, logits = self._runner[0].run(x)
        return [*taps, logits]

    def extra_repr(self) -> str:
        return (f"adopted {self.record.format} in {self.record.runtime} "
                f"{self.record.runtime_version}, taps={self.record.taps}, "
                f"classes={self.record.classes}, frozen")


def _same_file(column: AdoptedColumn, _incompatible: Any) -> None:
    """After loading weights: the sealed digest must be the running file's (else a file
    swapped in beside an unchanged weights file would run under an old seal)."""
    if column.model_sha256.device.type != "meta" and not column.file_matches():
        raise DataError(f"the adopted {column.record.format} file is not the one whose SHA-256 "
                        f"the weights record; restore the workspace from a backup")


# ----------------------------------------------------------------------------- adoption
def _probe_shapes(runner: ModuleTaps | OnnxTaps, input_shape: Shape, what: str,
                  ) -> tuple[list[list[int]], int]:
    """Tap shapes and class count from one run on two zero samples; refusals named.

    The sample shape may come from a manifest, so it is checked before the zeros are
    allocated: whole positive sizes, one sample within the machine's budget.
    """
    if not input_shape or not all(isinstance(n, int) and not isinstance(n, bool)
                                  and 0 < n <= MAX_SIZE for n in input_shape):
        raise DataError(f"the adopted model's input shape {list(input_shape)[:8]} is not a "
                        f"list of positive whole sizes; restore the manifest from a backup")
    check_activation(math.prod(input_shape), f"{what}: the input", DataError,
                     "give the input shape the model was certified on")
    x = torch.zeros(2, *input_shape)
    try:
        with torch.no_grad():
            taps, logits = runner.run(x)
    except UsageError:
        raise
    except Exception as exc:  # the user's model decides what it raises
        raise DataError(f"{what} rejects an input of sample shape {list(input_shape)} "
                        f"({exc.__class__.__name__}); give the input shape it was "
                        f"certified on") from None
    if isinstance(logits, (tuple, list, dict)):
        raise DataError(f"{what} returns {len(logits)} outputs (a {type(logits).__name__}), "
                        f"not one tensor of logits; adopt a model whose only output is the "
                        f"task's logits [N, classes] (wrap it to return the one you mean)")
    if not isinstance(logits, torch.Tensor) or logits.dim() != 2 or logits.shape[0] != 2:
        shape = list(logits.shape) if isinstance(logits, torch.Tensor) else type(logits).__name__
        raise DataError(f"{what} returns {shape} for 2 samples, not logits of shape "
                        f"[N, classes]; adopt a model whose output is one row per sample")
    if logits.shape[1] < 2:
        raise DataError(f"{what} returns {logits.shape[1]} class, a task needs at least 2")
    shapes = []
    for tap, t in zip(runner.taps, taps, strict=True):
        if t.dim() < 2 or t.shape[0] != 2:
            raise UsageError(f"tap {tap!r} does not give one row per sample "
                             f"(shape {list(t.shape)} for 2 samples); choose another tap")
        shapes.append([int(n) for n in t.shape[1:]])
    return shapes, int(logits.shape[1])


def _check_taps(taps: list[str]) -> list[str]:
    taps = [str(t) for t in taps]
    if not taps:
        raise UsageError("name at least one tap (--taps a,b,c) for later columns to read")
    if len(set(taps)) != len(taps):
        raise UsageError(f"a tap is named twice in {taps}; name each once")
    return taps


def _frozen(module: nn.Module) -> nn.Module:
    for p in module.parameters():
        p.requires_grad_(False)
    return module.eval()


def adopt_module(module: nn.Module, input_shape: Shape, taps: list[str],
                 ) -> tuple[AdoptedColumn, Callable[[torch.Tensor], torch.Tensor]]:
    """A column running a copy of ``module``; also the original, to run alone for proof."""
    if not isinstance(module, nn.Module):
        raise UsageError(f"adopt takes an nn.Module, got {type(module).__name__}")
    original = _frozen(module)
    runner = ModuleTaps(_frozen(copy.deepcopy(module)), _check_taps(taps))
    shapes, classes = _probe_shapes(runner, input_shape, "the model")
    record = AdoptedRecord("module", "torch", str(torch.__version__), runner.taps, shapes,
                           classes, list(input_shape))
    return AdoptedColumn(runner, record), original


def _exported_input_shape(ep: Any, path: str) -> Shape:
    placeholders = [n for n in ep.graph.nodes if n.op == "placeholder"
                    and n.name in ep.graph_signature.user_inputs]
    if len(placeholders) != 1:
        raise DataError(f"{path}: the program takes {len(placeholders)} inputs; adopt a "
                        f"model that takes one input tensor")
    val = placeholders[0].meta.get("val")
    shape = list(getattr(val, "shape", []))
    if shape and isinstance(shape[0], int):  # torch.export's default: the example's batch
        raise DataError(f"{path}: the program's batch dimension is fixed at {shape[0]}; "
                        f"export it with a dynamic batch axis: torch.export.export(model, "
                        f"(x,), dynamic_shapes=({{0: torch.export.Dim('batch')}},))")
    dims = shape[1:]
    if not all(isinstance(d, int) for d in dims):
        raise DataError(f"{path}: the program's sample shape {dims} is symbolic beyond the "
                        f"batch dimension and cannot be pinned; export it with a fixed "
                        f"sample shape")
    return tuple(int(d) for d in dims)


# ATen operators with their ``training``/``train`` flag's position: set, the program
# normalises by each batch's own statistics (and updates its buffers) or drops at random.
_TRAINING_FLAGS = {"batch_norm": 5, "dropout": 2, "feature_dropout": 2, "alpha_dropout": 2,
                   "feature_alpha_dropout": 2, "native_dropout": 2}


def _check_eval_mode(ep: Any, path: str) -> None:
    """A program exported from a model in training mode is refused: a sample's output
    would depend on the other samples of its batch, or on chance, and its batch-norm
    buffers would change at every call; torch.export keeps the mode it was given."""
    for node in ep.graph.nodes:
        op = getattr(node.target, "__name__", "").split(".")[0]
        at = _TRAINING_FLAGS.get(op)
        if node.op == "call_function" and at is not None and len(node.args) > at \
                and node.args[at] is True:
            raise DataError(f"{path}: the program was exported in training mode ({op} with "
                            f"training on, at node {node.name}), so a sample's output would "
                            f"depend on its batch or on chance; export it again after "
                            f"model.eval()")


def adopt_exported(data: bytes, input_shape: Shape, taps: list[str], path: str = "model.pt2",
                   ) -> tuple[AdoptedColumn, Callable[[torch.Tensor], torch.Tensor]]:
    """A column running a ``torch.export`` program read without pickle (model.exported)."""
    ep = load_exported_program(data, path)
    _check_eval_mode(ep, path)
    shape = _exported_input_shape(ep, path)
    if shape != tuple(input_shape):
        raise SpecError(f"the spec's input {list(input_shape)} differs from the program's "
                        f"sample shape {list(shape)}; make the spec's input equal it")
    original = ep.module()
    with warnings.catch_warnings():  # torch 2.13 warns about its own pytree internals here
        warnings.simplefilter("ignore", FutureWarning)
        unflat = torch.export.unflatten(ep)
    runner = ModuleTaps(_frozen(unflat), _check_taps(taps))
    shapes, classes = _probe_shapes(runner, input_shape, f"{path}")
    record = AdoptedRecord("pt2", "torch", str(torch.__version__), runner.taps, shapes,
                           classes, list(input_shape), hashlib.sha256(data).hexdigest(),
                           len(data))
    return AdoptedColumn(runner, record, data), original


def adopt_onnx(data: bytes, input_shape: Shape, taps: list[str], path: str = "model.onnx",
               ) -> tuple[AdoptedColumn, Callable[[torch.Tensor], torch.Tensor]]:
    """A column running an ONNX model in onnxruntime, taps as extra outputs."""
    runner = OnnxTaps(data, _check_taps(taps), input_shape, path)
    shapes, classes = _probe_shapes(runner, input_shape, f"{path}")
    record = AdoptedRecord("onnx", "onnxruntime", runner.version, runner.taps, shapes,
                           classes, list(input_shape), hashlib.sha256(data).hexdigest(),
                           len(data), dict(ORT_SETTINGS))
    return AdoptedColumn(runner, record, data), runner.original()


def rebuild_adopted(raw: dict[str, Any], data: bytes | None,
                    module: nn.Module | None = None) -> AdoptedColumn:
    """The column again from its manifest record and its file (or the user's module).

    The file's SHA-256 must match the record; tap shapes and classes must come out as
    recorded, so a different model under the same name is refused, not run.
    """
    try:
        record = AdoptedRecord(**raw)
    except TypeError:
        raise DataError("the manifest's adopted-model record is malformed; restore it "
                        "from a backup") from None
    if record.format == "module":
        if module is None:
            raise UsageError("column 0 of this workspace is a Python module adopted from "
                             "code; open it with colonnade.load(WS, module=MODEL)")
        column, _ = adopt_module(module, tuple(record.input), record.taps)
    else:
        if data is None or hashlib.sha256(data).hexdigest() != record.sha256:
            raise DataError(f"the adopted {record.format} file in the workspace does not "
                            f"match its recorded SHA-256; restore it from a backup")
        if record.format == "pt2":
            column, _ = adopt_exported(data, tuple(record.input), record.taps)
        elif record.format == "onnx":
            column, _ = adopt_onnx(data, tuple(record.input), record.taps)
        else:
            raise DataError(f"unknown adopted model format {record.format!r} in the "
                            f"manifest; restore it from a backup")
    got = (column.record.tap_shapes, column.record.classes)
    if got != (record.tap_shapes, record.classes):
        raise DataError(f"the adopted model now gives tap shapes {got[0]} and {got[1]} "
                        f"classes, not the recorded {record.tap_shapes} and "
                        f"{record.classes}; it is not the model that was adopted")
    column.record = record
    return column
