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
``JointAdapter`` is what a merge leaves: one low-rank map U V over the concatenated
outputs of several earlier columns, fitted to reproduce their adapters' summed output.
Adapters have no bias: the target layer's own bias already covers it.
"""

from __future__ import annotations

import torch
import torch.nn as nn

from .layers import Shape, make_activation
from .schema import Conv1d, Conv2d, LayerSpec

__all__ = ["LateralAdapter", "LinearAdapter", "NonlinearAdapter", "JointAdapter",
           "make_adapter", "rebuild_joint"]


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
    """Common base: records source and target shapes for accounting and display.

    ``bridge`` (None unless the source is a tap of an adopted column, model.bridges)
    reshapes the source before the adapter's maps: pooling, flattening or resampling.
    """

    kind = "lateral"

    def __init__(self, source_shape: Shape, target_shape: Shape,
                 bridge: nn.Module | None = None) -> None:
        super().__init__()
        self.source_shape = tuple(source_shape)
        self.target_shape = tuple(target_shape)
        self.bridge = bridge

    def extra_repr(self) -> str:
        return f"{list(self.source_shape)} -> {list(self.target_shape)}"


class LinearAdapter(LateralAdapter):
    """U h: Rusu et al. 2016, Eq. 1."""

    kind = "linear"

    def __init__(self, source_shape: Shape, target_shape: Shape, target: LayerSpec,
                 bridge: nn.Module | None = None, bridged_shape: Shape | None = None) -> None:
        super().__init__(source_shape, target_shape, bridge)
        features = (bridged_shape or source_shape)[0]
        self.U = _target_map(target, features, target_shape[0])

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        # Inner layers run through .forward: the same operations without a second module
        # dispatch per adapter (it shows at batch 1, benchmarks/run.py); hooks belong on
        # the adapter itself, where usage.py and merge.py put them.
        if self.bridge is not None:
            h = self.bridge(h)
        return self.U.forward(h)


class NonlinearAdapter(LateralAdapter):
    """U sigma(V alpha h): Rusu et al. 2016, Eq. 2."""

    kind = "nonlinear"

    def __init__(self, source_shape: Shape, target_shape: Shape, target: LayerSpec,
                 reduce: float = 0.5, activation: str = "relu",
                 bridge: nn.Module | None = None, bridged_shape: Shape | None = None) -> None:
        super().__init__(source_shape, target_shape, bridge)
        features = (bridged_shape or source_shape)[0]
        self.rank = max(1, int(round(features * reduce)))
        self.activation_name = activation
        # alpha starts at 1 so the adapter begins as a plain two-layer map (our choice).
        self.alpha = nn.Parameter(torch.ones(()))
        self.V = _pointwise(target, features, self.rank)
        self.act = make_activation(activation)
        self.U = _target_map(target, self.rank, target_shape[0])

    def reset_parameters(self) -> None:
        nn.init.ones_(self.alpha)
        self.V.reset_parameters()
        self.U.reset_parameters()

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        if self.bridge is not None:
            h = self.bridge(h)
        return self.U.forward(self.act.forward(self.V.forward(self.alpha * h)))  # see above

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, rank={self.rank}, act={self.activation_name}"


class JointAdapter(LateralAdapter):
    """U V [h_1; ...; h_n]: one rank-``rank`` map from several columns at once.

    V carries the target layer's kernel, stride and padding (a plain matrix for dense
    targets), U is pointwise, so at full rank the pair equals any sum of linear adapters
    from those columns exactly. Sources are concatenated along the feature (channel) axis.
    """

    kind = "joint"

    def __init__(self, source_shapes: list[Shape], target_shape: Shape, target: LayerSpec,
                 rank: int) -> None:
        channels = sum(int(s[0]) for s in source_shapes)
        super().__init__((channels, *source_shapes[0][1:]), target_shape)
        self.source_shapes = [tuple(s) for s in source_shapes]
        self.rank = int(rank)
        self.V = _target_map(target, channels, self.rank)
        self.U = _pointwise(target, self.rank, target_shape[0])

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.U.forward(self.V.forward(h))  # see LinearAdapter.forward

    def extra_repr(self) -> str:
        return f"{super().extra_repr()}, sources={len(self.source_shapes)}, rank={self.rank}"


def rebuild_joint(net, info) -> JointAdapter:  # noqa: ANN001 (a ProgressiveNet, AdapterInfo)
    """Rebuild a joint adapter from its manifest record (``extra``: sources, rank)."""
    shapes, target_shape, target = net.lateral_geometry(info.sources, info.column,
                                                        info.block, info.head)
    return JointAdapter(shapes, target_shape, target, int(info.extra["rank"]))


def make_adapter(kind: str, source_shape: Shape, target_shape: Shape, target: LayerSpec,
                 reduce: float = 0.5, activation: str = "relu",
                 bridge: nn.Module | None = None, bridged_shape: Shape | None = None,
                 ) -> LateralAdapter:
    """The one factory from the spec's lateral kind to an adapter module."""
    if kind == "linear":
        return LinearAdapter(source_shape, target_shape, target, bridge, bridged_shape)
    if kind == "nonlinear":
        return NonlinearAdapter(source_shape, target_shape, target, reduce, activation,
                                bridge, bridged_shape)
    raise ValueError(f"no adapter of kind {kind!r}")
