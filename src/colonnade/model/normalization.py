"""Input normalisation inside the network: ``(x - mean) / std`` per channel.

Applied as the network's first step, so every column, every export and every
prediction sees the same scaling, and it ships with the weights (two buffers in the
state dict). The values come from the spec (``input: {normalize: {mean, std}}``) or are
fitted on the first task's training data (``normalize: fit``); once a task exists they
are fixed, because changing them would move every task's outputs.

A channel is the first axis of the sample shape: ``C`` of ``[C, L]`` and ``[C, H, W]``,
each feature of a flat ``[F]`` input (per-feature standardisation).
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
import torch.nn as nn

__all__ = ["InputNormalization"]


class InputNormalization(nn.Module):
    """Per-channel ``(x - mean) / std``; ``mean`` and ``std`` are buffers, never trained."""

    def __init__(self, shape: Sequence[int], mean: Sequence[float] | None = None,
                 std: Sequence[float] | None = None) -> None:
        super().__init__()
        self.shape = tuple(int(s) for s in shape)
        view = (self.shape[0],) + (1,) * (len(self.shape) - 1)  # broadcast over (C, ...)
        self.register_buffer("mean", torch.zeros(view))
        self.register_buffer("std", torch.ones(view))
        if mean is not None and std is not None:
            self.set(mean, std)

    @property
    def channels(self) -> int:
        return self.shape[0]

    def set(self, mean: Sequence[float], std: Sequence[float]) -> None:
        """Fill the buffers; one value applies to every channel."""
        with torch.no_grad():
            self.mean.copy_(_per_channel(mean, self.channels).reshape(self.mean.shape))
            self.std.copy_(_per_channel(std, self.channels).reshape(self.std.shape))

    def values(self) -> dict[str, list[float]]:
        """The mean and std as plain lists, for the manifest and exported metadata."""
        return {"mean": self.mean.reshape(-1).tolist(), "std": self.std.reshape(-1).tolist()}

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.mean) / self.std

    def extra_repr(self) -> str:
        return f"channels={self.channels}"


def _per_channel(values: Sequence[float], channels: int) -> torch.Tensor:
    t = torch.as_tensor(list(values), dtype=torch.float32).reshape(-1)
    return t.expand(channels).clone() if t.numel() == 1 else t
