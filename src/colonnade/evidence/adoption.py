"""Proof that adopting a model changed nothing, computed before anything is written.

The adopted task's logits on a labelled probe, computed through the network exactly as a
seal computes its reference (``training.fit.task_logits``: eval mode, batches of
``EVAL_BATCH`` rows), must be byte for byte the logits of the original model run alone in
the same batches, with the same runtime settings. Before that comparison the original
is run twice: if its two outputs differ, the runtime is not deterministic with these
settings and no seal could ever check exact, so adoption is refused and the setting named.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch

from ..errors import DataError
from ..model.digest import bytes_digest, raw_bytes
from ..model.network import ProgressiveNet
from ..training.fit import EVAL_BATCH, task_logits

__all__ = ["prove_adoption"]


@torch.no_grad()
def _alone(original: Callable[[torch.Tensor], torch.Tensor], x: torch.Tensor,
           batch_size: int) -> torch.Tensor:
    parts = [original(x[i:i + batch_size]).detach().cpu()
             for i in range(0, x.shape[0], batch_size)]
    return torch.cat(parts)


def _settings(net: ProgressiveNet) -> str:
    record = net.adopted.record
    if record.runtime == "onnxruntime":
        s = record.settings
        return (f"onnxruntime {record.runtime_version} with intra-op threads "
                f"{s.get('intra_op_num_threads')}, inter-op threads "
                f"{s.get('inter_op_num_threads')} and {s.get('execution_mode')} execution")
    return f"torch {record.runtime_version} with {torch.get_num_threads()} intra-op threads"


def prove_adoption(net: ProgressiveNet, task: str,
                   original: Callable[[torch.Tensor], torch.Tensor], x: torch.Tensor,
                   batch_size: int = EVAL_BATCH) -> dict[str, Any]:
    """Refuse unless the adopted task's probe logits equal the original model's, bit for bit.

    Returns what the history records: rows, batch size, threads, the logits' digest.
    """
    if x.shape[0] == 0:
        raise DataError("the probe holds no samples; adoption needs a probe to prove that "
                        "the adopted model's outputs did not change")
    first = _alone(original, x, batch_size)
    second = _alone(original, x, batch_size)
    if raw_bytes(first) != raw_bytes(second):
        worst = float((first - second).abs().max())
        raise DataError(f"the model's output on the probe differs between two runs (by up to "
                        f"{worst:.3g}), so the runtime is not deterministic with "
                        f"{_settings(net)}; run it deterministically before adopting it")
    adopted = task_logits(net, task, x, batch_size=batch_size)
    if adopted.shape != first.shape or raw_bytes(adopted) != raw_bytes(first):
        worst = (float((adopted - first).abs().max()) if adopted.shape == first.shape
                 else float("nan"))
        raise DataError(f"the adopted column's output on the probe is not bit-identical to the "
                        f"original model's (largest difference {worst:.3g}); nothing was "
                        f"written")
    return {"samples": int(x.shape[0]), "batch_size": int(batch_size),
            "threads": torch.get_num_threads(), "runtime": _settings(net),
            "logits_sha256": bytes_digest(raw_bytes(first)), "bit_identical": True}
