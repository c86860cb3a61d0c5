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
           "make_adapter", "build_joint", "rebuild_joint"]


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

    A merge that takes in an adapter reading an adopted column's tap keeps that tap's own
    shape bridge (model.bridges): the tap is bridged to the target's output positions, as
    its adapter did, and a pointwise map T takes it to the same rank, so the joint map is
    U (V [h_1; ...; h_n] + T bridge(tap)) -- one matrix [V T] over the concatenated
    features of every output position, the columns' kernel windows beside the bridged
    tap. ``forward(h, tap)`` then takes the tap (unbridged) as its second input.
    """

    kind = "joint"

    def __init__(self, source_shapes: list[Shape], target_shape: Shape, target: LayerSpec,
                 rank: int, tap_shape: Shape | None = None, tap_bridge: nn.Module | None = None,
                 bridged_tap: Shape | None = None) -> None:
        channels = sum(int(s[0]) for s in source_shapes)
        super().__init__((channels, *source_shapes[0][1:]), target_shape)
        self.source_shapes = [tuple(s) for s in source_shapes]
        self.rank = int(rank)
        self.V = _target_map(target, channels, self.rank)
        # The tap's part, registered between V and U (the order in which they run).
        self.tap_shape = None if tap_shape is None else tuple(tap_shape)
        if tap_shape is not None:
            self.tap_bridge = tap_bridge
            self.bridged_tap = tuple(bridged_tap or tap_shape)
            self.T = _pointwise(target, self.bridged_tap[0], self.rank)
        self.U = _pointwise(target, self.rank, target_shape[0])

    def forward(self, h: torch.Tensor, tap: torch.Tensor | None = None) -> torch.Tensor:
        if self.tap_shape is None:
            return self.U.forward(self.V.forward(h))  # see LinearAdapter.forward
        t = tap if self.tap_bridge is None else self.tap_bridge(tap)
        return self.U.forward(self.V.forward(h) + self.T.forward(t))

    def extra_repr(self) -> str:
        tap = "" if self.tap_shape is None else f", tap {list(self.tap_shape)}"
        return (f"{super().extra_repr()}, sources={len(self.source_shapes)}{tap}, "
                f"rank={self.rank}")


def build_joint(net, sources: tuple[int, ...], column: int | None, block: int | None,  # noqa: ANN001
                head: str | None, rank: int, tap: int | None = None) -> JointAdapter:
    """The joint adapter over ``sources`` into one layer (a ProgressiveNet's geometry);
    with ``tap``, source column 0 is an adopted column read at that tap."""
    if tap is None:
        shapes, target_shape, target = net.lateral_geometry(sources, column, block, head)
        return JointAdapter(shapes, target_shape, target, rank)
    if net.adopted is None or not sources or sources[0] != 0:
        raise ValueError("a joint adapter reads a tap only of an adopted column 0")
    rest = tuple(s for s in sources if s != 0)
    shapes, target_shape, target = net.lateral_geometry(rest, column, block, head)
    where = f"head {head}" if head is not None else f"block {block}"
    tap_shape, bridge, bridged = net.tap_bridge(int(tap), target_shape, where)
    return JointAdapter(shapes, target_shape, target, rank, tap_shape, bridge, bridged)


def rebuild_joint(net, info) -> JointAdapter:  # noqa: ANN001 (a ProgressiveNet, AdapterInfo)
    """Rebuild a joint adapter from its manifest record (``extra``: sources, rank, tap)."""
    tap = info.extra.get("tap")
    return build_joint(net, info.sources, info.column, info.block, info.head,
                       int(info.extra["rank"]), None if tap is None else int(tap))


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
