"""``adopt``: a model the user already has becomes column 0 of a new workspace.

One transaction: read the model and the spec, build the adopted column, prove on the
probe that its task's logits are bit-identical to the original model's run alone, record
what was adopted (file digest, runtime and version, taps, the proof), optionally seal the
task, and only then create the workspace. Any refusal leaves nothing on disk.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn as nn

from ..clock import now
from ..errors import DataError, SpecError, UsageError
from ..evidence.adoption import prove_adoption
from ..evidence.seal import Probe, load_probe, seal_task
from ..files.store import create, require_creatable
from ..model.adopted import AdoptedColumn, adopt_exported, adopt_module, adopt_onnx
from ..model.budget import readable_bytes, tensor_budget
from ..model.digest import bytes_digest, raw_bytes
from ..model.network import ProgressiveNet
from ..model.schema import Spec
from ..model.spec import load_spec, parse_spec
from .transaction import attribution

__all__ = ["adopt", "adopt_workspace", "MODEL_FORMATS"]

MODEL_FORMATS = {".pt2": "a torch.export program", ".onnx": "an ONNX model"}
ONNX_MAX_BYTES = 2**31 - 1  # protobuf's limit on one serialized message (an ONNX file)
# The oldest operator set of an adopted ONNX model whose artifacts the tests export (the
# new parts are converted down from 18; README "Shipping tasks").
CONVERTED_FROM = 17


def _spec(spec: Any) -> Spec:
    if isinstance(spec, Spec):
        return spec
    if isinstance(spec, dict):
        return parse_spec(spec)
    if spec is None:
        raise UsageError("adopt needs a spec (--spec FILE) describing the columns grown later")
    return load_spec(spec)


def _read_model(path: str | Path) -> tuple[bytes, str]:
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in MODEL_FORMATS:
        raise UsageError(f"{path}: adopt reads a torch.export program (.pt2) or an ONNX model "
                         f"(.onnx); from Python, pass the nn.Module itself")
    try:
        size = path.stat().st_size  # checked before a byte is read (invariant 12)
        if suffix == ".onnx" and size > ONNX_MAX_BYTES:
            raise DataError(f"{path}: is {readable_bytes(size)}, larger than the 2 GiB one "
                            f"ONNX file can hold (protobuf's limit); adopt a model that is "
                            f"one file under 2 GiB")
        if size > tensor_budget():
            raise DataError(f"{path}: is {readable_bytes(size)}, more than half of this "
                            f"machine's memory ({readable_bytes(tensor_budget())}); adopt it "
                            f"on a machine with more memory")
        return path.read_bytes(), suffix
    except FileNotFoundError:
        raise DataError(f"{path}: no such model file") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot read the model file ({exc.strerror})") from None


def _column(model: Any, spec: Spec, taps: Sequence[str], input_shape: Sequence[int] | None,
            ) -> tuple[AdoptedColumn, Callable[[torch.Tensor], torch.Tensor], str]:
    """The adopted column, the original model to run alone, and a name for messages."""
    shape = tuple(spec.input)
    if input_shape is not None and tuple(int(n) for n in input_shape) != shape:
        raise SpecError(f"input: the spec's input {list(shape)} differs from the model's "
                        f"input shape {list(input_shape)}; make them equal")
    if isinstance(model, nn.Module):
        column, original = adopt_module(model, shape, list(taps))
        return column, original, "the model"
    data, suffix = _read_model(model)
    if suffix == ".pt2":
        column, original = adopt_exported(data, shape, list(taps), str(model))
    else:
        column, original = adopt_onnx(data, shape, list(taps), str(model))
    return column, original, str(model)


def _probe(probe: Any, net: ProgressiveNet, task: str, folder: str | Path | None) -> Probe:
    if isinstance(probe, (tuple, list)) and len(probe) == 2:
        x = torch.as_tensor(np.asarray(probe[0]), dtype=torch.float32)
        y = torch.as_tensor(np.asarray(probe[1]), dtype=torch.int64)
        digest = bytes_digest(raw_bytes(x) + raw_bytes(y))
        return Probe(x, y, digest, "(in memory)")
    return load_probe(probe, net, task, relative_to=folder)


def adopt(model: Any, input_shape: Sequence[int] | None = None, task: str = "adopted",
          taps: Sequence[str] = (), spec: Any = None, probe: Any = None,
          folder: str | Path | None = None) -> ProgressiveNet:
    """A network whose column 0 is ``model``, frozen, and whose task ``task`` is its output.

    ``model`` is an ``nn.Module`` (with its weights loaded) or the path of a ``.pt2`` or
    ``.onnx`` file; ``taps`` name the intermediate outputs later columns may read; ``spec``
    describes the columns grown later (its input must equal the model's). With ``probe``
    (a labelled data file, or ``(x, y)`` arrays) the adopted task's logits are proven
    bit-identical to the model's own on it, and the proof is recorded in the history.
    Nothing is written; save with ``colonnade.save`` or use ``adopt_workspace``.
    """
    spec = _spec(spec)
    column, original, _ = _column(model, spec, taps, input_shape)
    net = ProgressiveNet(spec)
    net.adopt(column, task)
    record = column.record
    entry: dict[str, Any] = {"step": "model_adopted", "task": task, "time": now(),
                             "format": record.format, "runtime": record.runtime,
                             "runtime_version": record.runtime_version,
                             "sha256": record.sha256, "taps": list(record.taps),
                             "classes": record.classes}
    opset = getattr(column._runner[0], "opset", None)
    if opset is not None and opset < CONVERTED_FROM:
        warnings.warn(f"{model}: uses ONNX operator set {opset}; an .onnx export of tasks "
                      f"that read it converts the new parts down to {opset} with onnx's "
                      f"version converter, which is tested from {CONVERTED_FROM} and may "
                      f"refuse; to be sure they ship, re-export the model at operator set 18 "
                      f"or later and adopt that file before growing on it", stacklevel=2)
    outputs = getattr(column._runner[0], "outputs", None)
    if outputs is not None:  # an ONNX graph: its first output is the task's logits
        entry["outputs"] = list(outputs)
    if probe is not None:
        loaded = _probe(probe, net, task, folder)
        entry["probe"] = {"path": loaded.path, "sha256": loaded.sha256,
                          "samples": int(loaded.x.shape[0])}
        entry["proof"] = prove_adoption(net, task, original, loaded.x)
        net.meta["_probe"] = loaded  # in memory only: for sealing in the same step
    net.meta["history"] += [{"step": "created", "time": entry["time"]}, entry]
    return net


def adopt_workspace(model: Any, folder: str | Path, task: str, taps: Sequence[str],
                    spec: Any, probe: Any, seal: bool = False,
                    input_shape: Sequence[int] | None = None, by: str | None = None,
                    reason: str | None = None, sign: str | Path | None = None,
                    ) -> dict[str, Any]:
    """``colonnade adopt``: prove, optionally seal, then create the workspace ``folder``.

    ``by``, ``reason`` and ``sign`` go to the record's first entries (transaction.py).
    """
    who = attribution("adopt", by, reason, sign)  # a wrong key stops here, before any work
    folder = Path(folder)
    require_creatable(folder)  # before the proof's work; again under the lock
    if probe is None:
        raise UsageError("adopt needs a labelled probe (--probe FILE) to prove that the "
                         "adopted model's outputs did not change")
    net = adopt(model, input_shape, task, taps, spec, probe, folder)
    loaded = net.meta.pop("_probe")
    entry = net.meta["history"][-1]
    sealed = seal_task(net, task, loaded) if seal else None
    create(net.spec, folder, net, who=who)
    return {"task": task, "workspace": str(folder), "adopted": net.adopted.record.to_dict(),
            "proof": entry["proof"], "probe": entry["probe"], "outputs": entry.get("outputs"),
            "seal": None if sealed is None else sealed["version"]}
