"""Where tensors run: the CPU by default, CUDA only when asked for and present."""

from __future__ import annotations

import torch

from ..errors import UsageError

__all__ = ["resolve_device"]


def resolve_device(name: str | None) -> torch.device:
    """``cpu`` by default; ``cuda`` only where torch can see a GPU."""
    if name in (None, "", "cpu"):
        return torch.device("cpu")
    if name.startswith("cuda"):
        if not torch.cuda.is_available():
            raise UsageError("--device cuda was asked for, but this torch sees no CUDA GPU; "
                             "use --device cpu")
        return torch.device(name)
    raise UsageError(f"unknown device {name!r}; use cpu or cuda")
