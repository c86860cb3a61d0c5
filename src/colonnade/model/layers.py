"""Layer builders and shape inference for the column template.

A template is cut into *blocks*: each block starts at a weighted layer (dense, conv1d,
conv2d) and carries the unweighted layers after it (norm, act, dropout, pool, flatten).
Lateral adapters add into a block right after its weighted layer, before the rest, which
is the pre-activation sum of Rusu et al. 2016, Eq. 1. Layers before the first weighted
layer form the column's *stem*.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch.nn as nn

from ..errors import SpecError, UsageError
from .schema import Act, Conv1d, Conv2d, Dense, Dropout, Flatten, LayerSpec, Norm, Pool, Spec

__all__ = [
    "Shape",
    "BlockPlan",
    "ColumnPlan",
    "plan_column",
    "template_shapes",
    "build_layer",
    "make_activation",
    "scaled_width",
    "check_width",
    "layer_output_shape",
]

Shape = tuple[int, ...]

_ACTIVATIONS: dict[str, type[nn.Module]] = {
    "relu": nn.ReLU,
    "gelu": nn.GELU,
    "tanh": nn.Tanh,
    "sigmoid": nn.Sigmoid,
    "leaky_relu": nn.LeakyReLU,
}


def make_activation(name: str) -> nn.Module:
    """The one factory from activation names to modules."""
    return _ACTIVATIONS[name]()


def scaled_width(units: int, width: float) -> int:
    """Features or channels of a weighted layer in a column of the given width factor."""
    return max(1, int(round(units * width)))


def _units(layer: LayerSpec) -> int | None:
    if isinstance(layer, Dense):
        return layer.dense
    if isinstance(layer, Conv1d):
        return layer.conv1d
    if isinstance(layer, Conv2d):
        return layer.conv2d
    return None


def check_width(spec: Spec, width: float) -> None:
    """Refuse a width factor that would leave a weighted layer with no units at all.

    ``scaled_width`` rounds to the nearest whole unit (Python's ``round``), so a layer of
    ``u`` units keeps at least one only when ``u * width`` rounds to 1 or more.
    """
    for i, layer in enumerate(spec.column):
        units = _units(layer)
        if units is not None and int(round(units * width)) < 1:
            smallest = min(u for u in map(_units, spec.column) if u is not None)
            raise UsageError(f"--width {width:g} leaves column[{i}] ({units} units) with no "
                             f"units at all; use a width of at least {1 / smallest:.3g}")


def _conv_length(length: int, kernel: int, stride: int, padding: int) -> int:
    # Output length of a convolution (the formula in torch.nn.Conv1d's documentation).
    return (length + 2 * padding - kernel) // stride + 1


def layer_output_shape(layer: LayerSpec, shape: Shape, width: float = 1.0,
                       where: str = "layer") -> Shape:
    """The shape a layer makes of ``shape``; a SpecError names ``where`` when it cannot."""
    if isinstance(layer, Dense):
        if len(shape) != 1:
            raise SpecError(f"{where}.dense: needs a flat input [features], got {list(shape)}; "
                            f"add {{flatten: true}} or {{pool: global_avg}} before it")
        return (scaled_width(layer.dense, width),)
    if isinstance(layer, (Conv1d, Conv2d)):
        dims = 2 if isinstance(layer, Conv1d) else 3
        name = "conv1d" if dims == 2 else "conv2d"
        if len(shape) != dims:
            want = "[channels, length]" if dims == 2 else "[channels, height, width]"
            raise SpecError(f"{where}.{name}: needs an input {want}, got {list(shape)}")
        spatial = tuple(_conv_length(n, layer.kernel, layer.stride, layer.padding)
                        for n in shape[1:])
        if min(spatial) < 1:
            raise SpecError(f"{where}.kernel: {layer.kernel} is larger than the padded input "
                            f"{list(shape)}; use a smaller kernel or more padding")
        channels = layer.conv1d if dims == 2 else layer.conv2d
        return (scaled_width(channels, width), *spatial)
    if isinstance(layer, Pool):
        if len(shape) < 2:
            raise SpecError(f"{where}.pool: needs an input with channels and length, "
                            f"got {list(shape)}")
        if layer.pool == "global_avg":
            return (shape[0],)
        stride = layer.stride or layer.size
        spatial = tuple(_conv_length(n, layer.size, stride, 0) for n in shape[1:])
        if min(spatial) < 1:
            raise SpecError(f"{where}.size: {layer.size} is larger than the input "
                            f"{list(shape)}; use a smaller pool")
        return (shape[0], *spatial)
    if isinstance(layer, Flatten):
        total = 1
        for n in shape:
            total *= n
        return (total,)
    return shape  # norm, act, dropout keep the shape


@dataclass(frozen=True)
class BlockPlan:
    """One weighted layer and the unweighted layers after it, with their shapes."""

    weighted: LayerSpec
    post: tuple[LayerSpec, ...]
    in_shape: Shape
    pre_shape: Shape  # the weighted layer's output, where laterals add
    out_shape: Shape
    template_index: int  # position of the weighted layer in the template


@dataclass(frozen=True)
class ColumnPlan:
    stem: tuple[LayerSpec, ...]
    stem_shape: Shape
    blocks: tuple[BlockPlan, ...]

    @property
    def out_shape(self) -> Shape:
        return self.blocks[-1].out_shape


def plan_column(spec: Spec, width: float = 1.0) -> ColumnPlan:
    """Cut the template into stem and blocks and infer every shape for this width."""
    shape: Shape = tuple(spec.input)
    stem: list[LayerSpec] = []
    blocks: list[BlockPlan] = []
    current: tuple[LayerSpec, Shape, Shape, int] | None = None
    post: list[LayerSpec] = []
    stem_shape = shape
    for i, layer in enumerate(spec.column):
        where = f"column[{i}]"
        new_shape = layer_output_shape(layer, shape, width, where)
        if layer.weighted:
            if current is not None:
                w, in_s, pre_s, idx = current
                blocks.append(BlockPlan(w, tuple(post), in_s, pre_s, shape, idx))
            else:
                stem_shape = shape
            current = (layer, shape, new_shape, i)
            post = []
        elif current is None:
            stem.append(layer)
        else:
            post.append(layer)
        shape = new_shape
    if current is None:
        raise SpecError("column: needs at least one dense, conv1d or conv2d layer")
    w, in_s, pre_s, idx = current
    blocks.append(BlockPlan(w, tuple(post), in_s, pre_s, shape, idx))
    if len(shape) != 1:
        raise SpecError(f"column: the last layer's output {list(shape)} must be flat for the "
                        f"head; end the column with {{flatten: true}} or {{pool: global_avg}}")
    return ColumnPlan(tuple(stem), stem_shape, tuple(blocks))


def template_shapes(spec: Spec) -> ColumnPlan:
    """Validate that every layer fits the shape before it; the plan at width 1."""
    return plan_column(spec, 1.0)


def build_layer(layer: LayerSpec, in_shape: Shape, width: float = 1.0) -> nn.Module:
    """The one factory from layer specs to torch modules."""
    if isinstance(layer, Dense):
        return nn.Linear(in_shape[0], scaled_width(layer.dense, width))
    if isinstance(layer, Conv1d):
        return nn.Conv1d(in_shape[0], scaled_width(layer.conv1d, width), layer.kernel,
                         stride=layer.stride, padding=layer.padding)
    if isinstance(layer, Conv2d):
        return nn.Conv2d(in_shape[0], scaled_width(layer.conv2d, width), layer.kernel,
                         stride=layer.stride, padding=layer.padding)
    if isinstance(layer, Norm):
        if layer.norm == "batch":
            return nn.BatchNorm1d(in_shape[0]) if len(in_shape) <= 2 else nn.BatchNorm2d(
                in_shape[0])
        # Layer norm: over features for flat inputs; over channels and positions for maps,
        # which is GroupNorm with one group (Wu & He 2018, Sec. 3.1).
        return nn.LayerNorm(in_shape[0]) if len(in_shape) == 1 else nn.GroupNorm(1, in_shape[0])
    if isinstance(layer, Act):
        return make_activation(layer.act)
    if isinstance(layer, Dropout):
        return nn.Dropout(layer.dropout)
    if isinstance(layer, Pool):
        if layer.pool == "global_avg":
            pool = nn.AdaptiveAvgPool1d(1) if len(in_shape) == 2 else nn.AdaptiveAvgPool2d(1)
            return nn.Sequential(pool, nn.Flatten())
        stride = layer.stride or layer.size
        if len(in_shape) == 2:
            cls = nn.MaxPool1d if layer.pool == "max" else nn.AvgPool1d
        else:
            cls = nn.MaxPool2d if layer.pool == "max" else nn.AvgPool2d
        return cls(layer.size, stride=stride)
    if isinstance(layer, Flatten):
        return nn.Flatten()
    raise TypeError(f"no builder for {type(layer).__name__}")
