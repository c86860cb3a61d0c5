"""Lateral adapters: maps from layer i-1 of an earlier column into layer i of a later one.

``LinearAdapter`` is Eq. 1 of Progressive Neural Networks (Rusu et al. 2016): one matrix
U per earlier column, added to the target layer's pre-activation. ``NonlinearAdapter``
is Eq. 2: a learned scalar scale alpha, a projection V that reduces the source features
by the factor ``reduce``, a nonlinearity, then U into the target layer. For convolutional
targets V is a 1x1 convolution and U has the target layer's kernel, stride and padding,
so the lateral lands on the same positions as the target's own output.

colonnade keeps one adapter per (earlier column, target layer) pair, where the paper
concatenates all earlier columns before V. With one earlier column the two coincide;
per-source adapters are what lets usage be measured and adapters be pruned one by one.
Adapters have no bias: the target layer's own bias already covers it.
"""

from __future__ import annotations

import torch
import torch.nn as nn

from .layers import Shape, make_activation
from .spec import Conv1d, Conv2d, LayerSpec

__all__ = ["LateralAdapter", "LinearAdapter", "NonlinearAdapter", "make_adapter"]


def _target_map(target: LayerSpec, in_channels: int, out_channels: int) -> nn.Module:
    """A bias-free map shaped like the target layer, from ``in_channels`` features."""
    if isinstance(target, Conv1d):
        return nn.Conv1d(in_channels, out_channels, target.kernel, stride=target.stride,
                         padding=target.padding, bias=False)
    if isinstance(target, Conv2d):
        return nn.Conv2d(in_channels, out_channels, target.kernel, stride=target.stride,
                         padding=target.padding, bias=False)
    return nn.Linear(in_channels, out_channels, bias=False)


def _pointwise(target: LayerSpec, in_channels: int, out_channels: int) -> nn.Module:
    if isinstance(target, Conv1d):
        return nn.Conv1d(in_channels, out_channels, 1, bias=False)
    if isinstance(target, Conv2d):
        return nn.Conv2d(in_channels, out_channels, 1, bias=False)
    return nn.Linear(in_channels, out_channels, bias=False)


class LateralAdapter(nn.Module):
    """Common base: records source and target shapes for accounting and display."""

    kind = "lateral"

    def __init__(self, source_shape: Shape, target_shape: Shape) -> None:
        super().__init__()
        self.source_shape = tuple(source_shape)
        self.target_shape = tuple(target_shape)

    def extra_repr(self) -> str:
        return f"{list(self.source_shape)} -> {list(self.target_shape)}"


class LinearAdapter(LateralAdapter):
    """U h: Rusu et al. 2016, Eq. 1."""

    kind = "linear"

    def __init__(self, source_shape: Shape, target_shape: Shape, target: LayerSpec) -> None:
        super().__init__(source_shape, target_shape)
        self.U = _target_map(target, source_shape[0], target_shape[0])

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.U(h)


class NonlinearAdapter(LateralAdapter):
    """U sigma(V alpha h): Rusu et al. 2016, Eq. 2."""

    kind = "nonlinear"

    def __init__(self, source_shape: Shape, target_shape: Shape, target: LayerSpec,
                 reduce: float = 0.5, activation: str = "relu") -> None:
        super().__init__(source_shape, target_shape)
        self.rank = max(1, int(round(source_shape[0] * reduce)))
        self.activation_name = activation
        # alpha starts at 1 so the adapter begins as a plain two-layer map (our choice).
        self.alpha = nn.Parameter(torch.ones(()))
        self.V = _pointwise(target, source_shape[0], self.rank)
        self.act = make_activation(activation)
        self.U = _target_map(target, self.rank, target_shape[0])

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.U(self.act(self.V(self.alpha * h)))

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, rank={self.rank}, act={self.activation_name}"


def make_adapter(kind: str, source_shape: Shape, target_shape: Shape, target: LayerSpec,
                 reduce: float = 0.5, activation: str = "relu") -> LateralAdapter:
    """The one factory from the spec's lateral kind to an adapter module."""
    if kind == "linear":
        return LinearAdapter(source_shape, target_shape, target)
    if kind == "nonlinear":
        return NonlinearAdapter(source_shape, target_shape, target, reduce, activation)
    raise ValueError(f"no adapter of kind {kind!r}")
