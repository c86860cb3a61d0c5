"""Running an artifact as it will run where it ships: onnxruntime, or torch for .pt files.

Bit-exactness is a property of the same computation (DESIGN.md, invariant 8), so every
run here states its runtime, version, thread count and batch size, records them with the
outputs, and a later check repeats exactly those: rows are fed in fixed batches, and
onnxruntime gets one session with a fixed intra-op thread count and sequential execution.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

import numpy as np
import torch

from ..errors import ColonnadeError
from .artifact import artifact_model
from .onnx_export import INPUT_NAME

__all__ = ["RUN_THREADS", "RUN_BATCH", "Runner", "onnx_runner", "torch_runner",
           "runtime_version"]

RUN_THREADS = 1  # one thread: deterministic, and what a small device has
RUN_BATCH = 64


def runtime_version(name: str) -> str:
    if name == "torch":
        return str(torch.__version__)
    import onnxruntime

    return str(onnxruntime.__version__)


@contextlib.contextmanager
def _torch_threads(threads: int) -> Iterator[None]:
    before = torch.get_num_threads()
    torch.set_num_threads(int(threads))
    try:
        yield
    finally:
        torch.set_num_threads(before)


class Runner:
    """An artifact loaded in its runtime; ``run(x)`` gives every output, in fixed batches."""

    def __init__(self, name: str, outputs: list[str], call: Any, threads: int, batch: int,
                 ) -> None:
        self.name = name
        self.outputs = list(outputs)
        self._call = call
        self.threads = int(threads)
        self.batch = int(batch)

    @property
    def runtime(self) -> dict[str, Any]:
        """What a check must repeat: runtime, version, threads and batch size."""
        return {"name": self.name, "version": runtime_version(self.name),
                "threads": self.threads, "batch": self.batch}

    def run_batch(self, xb: np.ndarray) -> list[np.ndarray]:
        """One call on one batch, as given: the outputs in ``self.outputs`` order."""
        return list(self._call(xb))

    def run(self, x: np.ndarray | torch.Tensor) -> dict[str, np.ndarray]:
        rows = x.numpy() if isinstance(x, torch.Tensor) else np.asarray(x)
        rows = np.ascontiguousarray(rows, dtype=np.float32)
        parts: dict[str, list[np.ndarray]] = {o: [] for o in self.outputs}
        for i in range(0, rows.shape[0], self.batch):
            for name, value in zip(self.outputs, self._call(rows[i:i + self.batch]),
                                   strict=True):
                parts[name].append(np.asarray(value))
        return {o: np.concatenate(p) if p else np.zeros((0,), np.float32)
                for o, p in parts.items()}


def onnx_runner(data: bytes, threads: int = RUN_THREADS, batch: int = RUN_BATCH) -> Runner:
    """An onnxruntime session (CPU, ``threads`` intra-op threads, sequential) on ``data``."""
    try:
        import onnxruntime as ort
    except ImportError:
        raise ColonnadeError("running ONNX artifacts needs onnxruntime; install it with pip "
                             "install 'colonnade[onnx]'") from None
    options = ort.SessionOptions()
    options.intra_op_num_threads = int(threads)
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.log_severity_level = 3  # errors only: no notes about optimisations on stderr
    try:
        session = ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
    except Exception as exc:  # a damaged file: onnxruntime's own words, in one sentence
        raise ColonnadeError(f"onnxruntime cannot load the artifact "
                             f"({str(exc).splitlines()[0][:200]})") from None
    outputs = [o.name for o in session.get_outputs()]
    return Runner("onnxruntime", outputs, lambda xb: session.run(outputs, {INPUT_NAME: xb}),
                  threads, batch)


def torch_runner(blob: dict[str, Any], threads: int = RUN_THREADS, batch: int = RUN_BATCH,
                 ) -> Runner:
    """The .pt artifact's model in torch, on the CPU, with ``threads`` intra-op threads."""
    model = artifact_model(blob)

    def call(xb: np.ndarray) -> list[np.ndarray]:
        with torch.no_grad(), _torch_threads(threads):
            return [t.numpy() for t in model(torch.from_numpy(xb))]

    return Runner("torch", list(model.tasks), call, threads, batch)
