"""Which tap of an adopted column feeds which block, and the shape bridges between them.

The tap -> block rule. A template column's block 0 reads the data and takes no lateral.
By default the adopted column's taps, in the order they were named, feed blocks 1..n of
every later column: block ``b`` reads tap ``b`` (``taps[b - 1]``); blocks past the last
tap read none; a column with fewer blocks leaves the remaining taps to the heads. The
last tap also feeds the heads: a head grown on the adopted column (``--mode head``) reads
it, and so does every later task's head adapter from column 0. The spec can map blocks to
taps explicitly instead: ``lateral: {taps: {1: layer3, 3: avgpool}}``; blocks not named
then read no tap.

The shape bridges, applied to the tap before the usual Eq. 1 / Eq. 2 adapter (Rusu et
al. 2016):

* into a dense block (or a head): global average pooling over the tap's positions
  (``lateral.bridge: pool``, the default) or flattening (``lateral.bridge: flatten``);
* into a convolutional block: resampling to the positions of the block's output, by
  adaptive average pooling when the tap is at least as large in every dimension, else by
  nearest-neighbour upsampling; the adapter's maps are then 1x1 convolutions, so its
  output lands on the block's positions one to one;
* a flat tap cannot feed a convolutional block (refused, naming the block).
"""

from __future__ import annotations

import math

import torch.nn as nn

from ..errors import SpecError
from .layers import Shape
from .schema import Conv1d, Conv2d, Dense, LayerSpec

__all__ = ["tap_for_block", "bridge_for", "bridged_target"]


def tap_for_block(taps: list[str], block: int, mapping: dict[int, str] | None) -> int | None:
    """The index of the tap that feeds ``block`` of a later column, or None."""
    if mapping:
        name = mapping.get(block)
        if name is None:
            return None
        if name not in taps:
            raise SpecError(f"lateral.taps.{block}: the adopted model has no tap {name!r}; "
                            f"its taps are {', '.join(taps)}")
        return taps.index(name)
    return block - 1 if 1 <= block <= len(taps) else None


def bridge_for(tap: Shape, target: Shape, mode: str = "pool",
               where: str = "block") -> tuple[nn.Module | None, Shape]:
    """The bridge from a tap's shape to the target's layout, and the shape it gives."""
    tap, target = tuple(tap), tuple(target)
    if len(target) == 1:  # a dense block or a head: one feature vector per sample
        if len(tap) == 1:
            return None, tap
        if mode == "flatten":
            return nn.Flatten(), (math.prod(tap),)
        pool = nn.AdaptiveAvgPool1d(1) if len(tap) == 2 else nn.AdaptiveAvgPool2d(1)
        return nn.Sequential(pool, nn.Flatten()), (tap[0],)
    if len(tap) != len(target):
        kind = "flat" if len(tap) == 1 else f"{len(tap) - 1}-d"
        raise SpecError(f"a {kind} tap of shape {list(tap)} cannot feed the "
                        f"{len(target) - 1}-d convolutional {where} of shape {list(target)}; "
                        f"map it to a dense block with lateral.taps")
    if tap[1:] == target[1:]:
        return None, tap
    size = tuple(target[1:])
    if all(a >= b for a, b in zip(tap[1:], size, strict=True)):
        pool = nn.AdaptiveAvgPool1d(size) if len(size) == 1 else nn.AdaptiveAvgPool2d(size)
        return pool, (tap[0], *size)
    return nn.Upsample(size=size, mode="nearest"), (tap[0], *size)


def bridged_target(target: LayerSpec, target_shape: Shape) -> LayerSpec:
    """The layer an adapter after a bridge is shaped like: pointwise for convolutions."""
    if isinstance(target, Conv1d):
        return Conv1d(conv1d=target_shape[0], kernel=1)
    if isinstance(target, Conv2d):
        return Conv2d(conv2d=target_shape[0], kernel=1)
    return Dense(dense=target_shape[0])
