"""Fitting the input normalisation (``normalize: fit``) on the first task's training data.

Per-channel mean and standard deviation (population, over every sample and position of
the channel), accumulated in float64 over fixed chunks in row order, so the figures do
not depend on memory or on how the data is stored, and a streamed set needs one pass.
"""

from __future__ import annotations

import torch

from .datasets import Rows

__all__ = ["fit_normalization"]

_CHUNK = 1024


def fit_normalization(x: torch.Tensor | Rows) -> tuple[list[float], list[float], list[str]]:
    """Mean and std per channel (the first axis of a sample) and notes on what was done.

    A channel whose values never vary gets std 1 (dividing by zero would make every
    output infinite); the notes say which.
    """
    n, channels = int(x.shape[0]), int(x.shape[1])
    total = torch.zeros(channels, dtype=torch.float64)
    squares = torch.zeros(channels, dtype=torch.float64)
    count = 0
    for i in range(0, n, _CHUNK):
        block = x[i:i + _CHUNK].to(torch.float64)
        flat = block.reshape(block.shape[0], channels, -1)  # (B, C, positions)
        total += flat.sum(dim=(0, 2))
        squares += (flat * flat).sum(dim=(0, 2))
        count += flat.shape[0] * flat.shape[2]
    mean = total / count
    std = (squares / count - mean * mean).clamp_min(0).sqrt()
    constant = [int(c) for c in torch.nonzero(std < 1e-12).reshape(-1)]
    std[std < 1e-12] = 1.0
    notes = ([f"channel(s) {', '.join(map(str, constant))} never vary; their std is set to 1"]
             if constant else [])
    return mean.tolist(), std.tolist(), notes
