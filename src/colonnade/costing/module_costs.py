"""MACs and output shapes of single modules, by the rule of ``costs.py``.

Multiply-accumulates of dense and convolutional layers, from their hyperparameters and
the input shape (the ``torch.utils.flop_counter`` rule: matmul and convolution only);
elementwise layers count none and views pass shapes through. The whole-network figures
that add these up per task are in ``costs.py``.
"""

from __future__ import annotations

import math

import torch.nn as nn

from ..model.adapters import JointAdapter, LateralAdapter, LinearAdapter, NonlinearAdapter
from ..model.adopted import AdoptedColumn
from ..model.layers import Shape
from ..model.parts import Column
from .adopted import adopted_cost

__all__ = ["VIEWS", "adapter_steps", "module_output_shape", "layer_macs", "adapter_macs",
           "module_macs"]

_ELEMENTWISE = (nn.BatchNorm1d, nn.BatchNorm2d, nn.LayerNorm, nn.GroupNorm, nn.ReLU, nn.GELU,
                nn.Tanh, nn.Sigmoid, nn.LeakyReLU)
VIEWS = (nn.Flatten, nn.Dropout, nn.Identity)


# ----------------------------------------------------------------------------- shapes
def _pair(value: int | tuple[int, ...], n: int) -> tuple[int, ...]:
    return tuple(value) if isinstance(value, tuple) else (value,) * n


def _window(n: int, kernel: int, stride: int, padding: int, dilation: int = 1,
            ceil: bool = False) -> int:
    # Output length of a convolution or pooling window (torch.nn.Conv1d / MaxPool1d docs).
    span = n + 2 * padding - dilation * (kernel - 1) - 1
    out = (-(-span // stride) if ceil else span // stride) + 1
    if ceil and (out - 1) * stride >= n + padding:
        out -= 1
    return out


def module_output_shape(module: nn.Module, shape: Shape) -> Shape:
    """The per-sample output shape of a module colonnade builds, from its hyperparameters."""
    if isinstance(module, nn.Sequential):
        for child in module:
            shape = module_output_shape(child, shape)
        return shape
    if isinstance(module, nn.Linear):
        if shape[-1] != module.in_features:
            raise ValueError(f"{module} cannot take a sample of shape {list(shape)}")
        return (*shape[:-1], module.out_features)
    if isinstance(module, (nn.Conv1d, nn.Conv2d)):
        d = 1 if isinstance(module, nn.Conv1d) else 2
        if len(shape) != d + 1 or shape[0] != module.in_channels:
            raise ValueError(f"{module} cannot take a sample of shape {list(shape)}")
        k, s = _pair(module.kernel_size, d), _pair(module.stride, d)
        p, dil = _pair(module.padding, d), _pair(module.dilation, d)
        return (module.out_channels,
                *(_window(n, k[i], s[i], p[i], dil[i]) for i, n in enumerate(shape[1:])))
    if isinstance(module, (nn.MaxPool1d, nn.MaxPool2d, nn.AvgPool1d, nn.AvgPool2d)):
        d = 1 if isinstance(module, (nn.MaxPool1d, nn.AvgPool1d)) else 2
        k, s = _pair(module.kernel_size, d), _pair(module.stride or module.kernel_size, d)
        p = _pair(module.padding, d)
        dil = _pair(getattr(module, "dilation", 1), d)
        return (shape[0], *(_window(n, k[i], s[i], p[i], dil[i], module.ceil_mode)
                            for i, n in enumerate(shape[1:])))
    if isinstance(module, (nn.AdaptiveAvgPool1d, nn.AdaptiveAvgPool2d)):
        d = 1 if isinstance(module, nn.AdaptiveAvgPool1d) else 2
        size = _pair(module.output_size, d)
        return (shape[0], *(n if size[i] is None else size[i] for i, n in enumerate(shape[1:])))
    if isinstance(module, nn.Upsample):  # a tap bridge (model.bridges): its size is set
        return (shape[0], *_pair(module.size, len(shape) - 1))
    if isinstance(module, nn.Flatten):
        start = module.start_dim - 1 if module.start_dim > 0 else len(shape) + module.start_dim
        end = module.end_dim - 1 if module.end_dim > 0 else len(shape) + module.end_dim
        return (*shape[:start], math.prod(shape[start:end + 1]), *shape[end + 1:])
    if isinstance(module, _ELEMENTWISE + VIEWS):
        return tuple(shape)
    raise TypeError(f"colonnade has no cost rule for {type(module).__name__}; add one to "
                    f"costs.module_output_shape")


def layer_macs(module: nn.Module, shape: Shape) -> int:
    """MACs of one layer on one sample of ``shape``; zero for every elementwise layer.

    Dense: out x in per position. Convolution: output elements x (in channels / groups)
    x kernel elements (the count FlopCounterMode uses for aten.convolution).
    """
    if isinstance(module, nn.Sequential):
        total = 0
        for child in module:
            total += layer_macs(child, shape)
            shape = module_output_shape(child, shape)
        return total
    if isinstance(module, nn.Linear):
        module_output_shape(module, shape)  # checks the shape fits
        return math.prod(shape[:-1]) * module.in_features * module.out_features
    if isinstance(module, (nn.Conv1d, nn.Conv2d)):
        out = module_output_shape(module, shape)
        return (math.prod(out) * (module.in_channels // module.groups)
                * math.prod(_pair(module.kernel_size, len(shape) - 1)))
    module_output_shape(module, shape)  # raises for modules without a cost rule
    return 0


def adapter_steps(adapter: nn.Module) -> list[tuple[str, nn.Module | None]]:
    """The layers an adapter applies to its source, in order; None is the scalar scale.
    An adapter reading an adopted column's tap first applies its shape bridge."""
    bridge = [("bridge", adapter.bridge)] if getattr(adapter, "bridge", None) is not None else []
    if isinstance(adapter, NonlinearAdapter):
        return [*bridge, ("alpha", None), ("V", adapter.V), ("act", adapter.act),
                ("U", adapter.U)]
    if isinstance(adapter, LinearAdapter):
        return [*bridge, ("U", adapter.U)]
    # Other kinds (for example the result of a merge) apply their children in order.
    return [(name, child) for name, child in adapter.named_children()]


def adapter_macs(adapter: nn.Module) -> int:
    """MACs of a lateral adapter on one sample of its source: its maps; alpha counts none.
    A joint adapter that reads a tap adds its tap's bridge and map T (model.adapters)."""
    if isinstance(adapter, JointAdapter) and adapter.tap_shape is not None:
        total = layer_macs(adapter.V, tuple(adapter.source_shape))
        shape = tuple(adapter.tap_shape)
        if adapter.tap_bridge is not None:
            total += layer_macs(adapter.tap_bridge, shape)
            shape = module_output_shape(adapter.tap_bridge, shape)
        total += layer_macs(adapter.T, shape)
        return total + layer_macs(adapter.U, module_output_shape(adapter.T, shape))
    shape, total = tuple(adapter.source_shape), 0
    for _, step in adapter_steps(adapter):
        if step is not None:
            total += layer_macs(step, shape)
            shape = module_output_shape(step, shape)
    return total


def module_macs(module: nn.Module, shape: Shape, depth: int | None = None) -> int:
    """MACs of a column (on the network input shape; ``depth``: its stem and leading
    blocks only), an adapter (on its source shape), or a plain layer such as a head (on
    ``shape``)."""
    if isinstance(module, LateralAdapter):
        return adapter_macs(module)
    if isinstance(module, AdoptedColumn):  # counted from the model itself (costing.adopted)
        return adopted_cost(module).macs
    if isinstance(module, Column):
        total = layer_macs(module.stem, shape)
        shape = module_output_shape(module.stem, shape)
        for block in list(module.blocks)[:depth]:
            total += layer_macs(block.weighted, shape)
            shape = module_output_shape(block.weighted, shape)
            total += layer_macs(block.post, shape)
            shape = module_output_shape(block.post, shape)
        return total
    return layer_macs(module, shape)


def column_prefix(col: Column, depth: int | None = None) -> nn.Module:
    """What of a column runs to ``depth`` blocks (its stem and leading blocks), as one
    module for counting; the column itself when it runs whole."""
    if depth is None or depth >= len(col.blocks):
        return col
    return nn.ModuleList([col.stem, *list(col.blocks)[:depth]])


# ----------------------------------------------------------------------------- parameters
