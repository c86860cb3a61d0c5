"""Sizing: what the next N tasks will cost, and whether each task fits a device.

The projection follows the spec's growth rule (Rusu et al. 2016, Appendix B): a task
grown as a column adds the template column at its width, its head, and one lateral
adapter per earlier column into every block after the first and into its head. So with
equal widths the parameters a task adds are ``a + b*k`` for its column index k (k
earlier columns): linear in k, and the whole network after n columns holds
``n*a + b*n*(n-1)/2``, quadratic in n. A task grown as a head only adds its head and
one head adapter per column before the one it sits on.

Parameters and MACs of projected tasks come from closed forms over the spec's layer
shapes (``layer_figures`` and friends below), written apart from ``costs`` on purpose:
the tests grow the columns for real and check the two agree exactly. Peak activation
memory of a projected task is counted by building the projected network on PyTorch's
``meta`` device (shapes, no weights) and applying ``costs.peak_activation``.

Verdicts against a device and the priced options are in ``verdicts.py``.
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field

import torch

from ..errors import UsageError
from ..model.adopted import AdoptedColumn
from ..model.bridges import bridge_for, bridged_target, tap_for_block
from ..model.layers import Shape, check_width, layer_output_shape, plan_column
from ..model.network import ProgressiveNet
from ..model.schema import Conv1d, Conv2d, Dense, LateralSpec, LayerSpec, Norm, Spec
from .costs import (
    NetworkCost,
    column_prefix,
    count_params,
    ledger_of,
    module_macs,
    peak_activation,
)

__all__ = ["Figures", "layer_figures", "column_figures", "adapter_figures", "head_figures",
           "GrowthRule", "ProjectedTask", "Projection", "project", "MAX_PROJECT"]

MAX_PROJECT = 256


# ----------------------------------------------------------------------------- closed forms
@dataclass(frozen=True)
class Figures:
    """Parameters, floating buffer elements and batch-1 MACs of some parts."""

    params: int = 0
    float_buffers: int = 0
    macs: int = 0

    def __add__(self, other: Figures) -> Figures:
        return Figures(self.params + other.params, self.float_buffers + other.float_buffers,
                       self.macs + other.macs)


def _kernel_elements(layer: LayerSpec) -> int:
    if isinstance(layer, Conv1d):
        return layer.kernel
    if isinstance(layer, Conv2d):
        return layer.kernel ** 2
    return 1


def layer_figures(layer: LayerSpec, in_shape: Shape, out_shape: Shape) -> Figures:
    """One template layer: dense and conv weights plus bias; norms' scale and shift.

    Dense: in*out + out parameters, in*out MACs. Conv: out*in*K + out parameters and
    out_elements*in*K MACs (K kernel elements). Batch norm: 2*C parameters and 2*C
    running statistics; layer norm (GroupNorm with one group on maps): 2*C parameters.
    """
    if isinstance(layer, Dense):
        return Figures(in_shape[0] * out_shape[0] + out_shape[0], 0, in_shape[0] * out_shape[0])
    if isinstance(layer, (Conv1d, Conv2d)):
        k = _kernel_elements(layer)
        return Figures(out_shape[0] * in_shape[0] * k + out_shape[0], 0,
                       math.prod(out_shape) * in_shape[0] * k)
    if isinstance(layer, Norm):
        c = in_shape[0]
        return Figures(2 * c, 2 * c if layer.norm == "batch" else 0, 0)
    return Figures()


def column_figures(spec: Spec, width: float, depth: int | None = None) -> Figures:
    """A column of the template at ``width``: whole, or its stem and leading ``depth``
    blocks."""
    plan = plan_column(spec, width)
    total, shape = Figures(), tuple(spec.input)
    for layer in plan.stem:
        out = layer_output_shape(layer, shape, width)
        total, shape = total + layer_figures(layer, shape, out), out
    for block in plan.blocks[:depth]:
        total += layer_figures(block.weighted, block.in_shape, block.pre_shape)
        shape = block.pre_shape
        for layer in block.post:
            out = layer_output_shape(layer, shape, width)
            total, shape = total + layer_figures(layer, shape, out), out
    return total


def adapter_figures(lateral: LateralSpec, source: Shape, target: Shape,
                    target_layer: LayerSpec) -> Figures:
    """One lateral adapter from an output of ``source`` shape into a ``target`` layer.

    Linear (Eq. 1): U, shaped like the target layer without bias: Cs*Ct*K parameters,
    target_positions*Cs*Ct*K MACs. Nonlinear (Eq. 2): alpha (1 parameter, no MACs), V
    from Cs to r = round(Cs*reduce) features (a 1x1 map: Cs*r parameters,
    source_positions*Cs*r MACs), then U from r (r*Ct*K, target_positions*r*Ct*K).
    """
    if lateral.kind == "none":
        return Figures()
    cs, ct, k = source[0], target[0], _kernel_elements(target_layer)
    src_pos, dst_pos = math.prod(source[1:]), math.prod(target[1:])
    if lateral.kind == "linear":
        return Figures(cs * ct * k, 0, dst_pos * cs * ct * k)
    r = max(1, int(round(cs * lateral.reduce)))
    return Figures(1 + cs * r + r * ct * k, 0, src_pos * cs * r + dst_pos * r * ct * k)


def head_figures(features: int, classes: int) -> Figures:
    """A head: a dense layer from the column's last features to the classes."""
    return Figures(features * classes + classes, 0, features * classes)


def _block_adapters(spec: Spec, lateral: LateralSpec, source_width: float,
                    target_width: float) -> Figures:
    """Every block adapter from one column into a later one (blocks 1..B-1)."""
    src, dst = plan_column(spec, source_width), plan_column(spec, target_width)
    total = Figures()
    for b in range(1, len(dst.blocks)):
        total += adapter_figures(lateral, src.blocks[b - 1].out_shape, dst.blocks[b].pre_shape,
                                 dst.blocks[b].weighted)
    return total


def _measured_column(net: ProgressiveNet, k: int, depth: int) -> Figures:
    """An existing column's stem and leading ``depth`` blocks, from its live modules."""
    part = count_params(column_prefix(net.columns[k], depth), "column")
    return Figures(part.total, part.float_buffers,
                   module_macs(net.columns[k], tuple(net.input_shape), depth))


def _measured_adapter(adapter: torch.nn.Module) -> Figures:
    return Figures(count_params(adapter, "adapters").total, 0, module_macs(adapter, ()))


def _future_adapter(meta: ProgressiveNet, key: str, lateral: LateralSpec) -> Figures:
    """A projected adapter by the closed form, from its place in the meta network; one
    reading an adopted column's tap from its module there (its bridge sets its shapes)."""
    info = meta.adapter_info[key]
    if "tap" in info.extra:
        return _measured_adapter(meta.adapters[key])
    shapes, target_shape, target = meta.lateral_geometry(info.sources, info.column,
                                                         info.block, info.head)
    return adapter_figures(lateral, shapes[0], target_shape, target)


def _head_adapter(spec: Spec, lateral: LateralSpec, source_width: float,
                  classes: int) -> Figures:
    features = plan_column(spec, source_width).out_shape
    return adapter_figures(lateral, features, (classes,), Dense(dense=classes))


def _tap_block_adapters(column: AdoptedColumn, spec: Spec, lateral: LateralSpec,
                        target_width: float) -> Figures:
    """Every block adapter from an adopted column's taps into a new column: each tap
    through its shape bridge, then a pointwise map into the block (model.bridges)."""
    dst, total = plan_column(spec, target_width), Figures()
    for b in range(1, len(dst.blocks)):
        tap = tap_for_block(column.taps, b, lateral.taps)
        if tap is None:
            continue
        block = dst.blocks[b]
        _, bridged = bridge_for(tuple(column.record.tap_shapes[tap]), block.pre_shape,
                                lateral.bridge)
        total += adapter_figures(lateral, bridged, block.pre_shape,
                                 bridged_target(block.weighted, block.pre_shape))
    return total


def _last_tap_features(column: AdoptedColumn, lateral: LateralSpec, classes: int) -> Shape:
    """What a head (or head adapter) reads of an adopted column: its bridged last tap."""
    return bridge_for(tuple(column.record.tap_shapes[-1]), (classes,), lateral.bridge)[1]


def _from_source(net: ProgressiveNet, spec: Spec, lateral: LateralSpec, j: int,
                 source_width: float, target_width: float) -> Figures:
    if j == 0 and net.adopted is not None:
        return _tap_block_adapters(net.adopted, spec, lateral, target_width)
    return _block_adapters(spec, lateral, source_width, target_width)


def _head_from_source(net: ProgressiveNet, spec: Spec, lateral: LateralSpec, j: int,
                      source_width: float, classes: int) -> Figures:
    if j == 0 and net.adopted is not None:
        features = _last_tap_features(net.adopted, lateral, classes)
        return adapter_figures(lateral, features, (classes,), Dense(dense=classes))
    return _head_adapter(spec, lateral, source_width, classes)


def _carrier_features(net: ProgressiveNet, lateral: LateralSpec, carrier: int,
                      classes: int) -> int:
    col = net.columns[carrier]
    if isinstance(col, AdoptedColumn):
        return _last_tap_features(col, lateral, classes)[0]
    return col.out_features


# ----------------------------------------------------------------------------- projection
@dataclass(frozen=True)
class GrowthRule:
    """How future tasks grow, with the per-task figures of the closed form."""

    mode: str  # "column" or "head"
    width: float
    classes: int
    lateral: str
    base: Figures  # column + head (mode column) or head (mode head)
    per_earlier_column: Figures  # lateral adapters added per earlier column of this width

    def text(self) -> str:
        a, b = self.base, self.per_earlier_column
        if self.mode == "head":
            via = ("" if self.lateral == "none" else
                   ", with one head adapter per column before that one")
            return (f"each future task adds only a head for {self.classes} classes on the "
                    f"newest column{via}: "
                    f"{a.params:,} parameters and {a.macs:,} MACs per task, constant, so "
                    f"the network grows linearly")
        if self.lateral == "none":
            return (f"each future task adds a column of width {self.width:g} and its head "
                    f"({a.params:,} parameters, {a.macs:,} MACs) with no lateral adapters: "
                    f"constant per task, so the network grows linearly")
        return (f"each future task adds a column of width {self.width:g} and its head "
                f"(a = {a.params:,} parameters, {a.macs:,} MACs) plus {self.lateral} lateral "
                f"adapters from every earlier column (b = {b.params:,} parameters, "
                f"{b.macs:,} MACs per earlier column of width {self.width:g}); so the task "
                f"with k earlier columns adds a + b*k parameters, linear in k, and the "
                f"network after n such columns holds n*a + b*n*(n-1)/2, quadratic in n "
                f"(Rusu et al. 2016, Appendix B); the task's own path MACs grow "
                f"quadratically too, since its closure holds every earlier column")


@dataclass(frozen=True)
class ProjectedTask:
    """One future task: what it adds, what its path needs, and the network after it."""

    task: str
    index: int  # 1-based among the future tasks
    mode: str
    column: int
    width: float
    added: Figures
    path: Figures
    activation_elements: int
    network: Figures  # every part of the network once this task is grown
    network_macs_all: int  # MACs of one forward_all pass after this task
    added_by_part: dict[str, int]  # parameters added: column, adapters, head
    path_macs_by_part: dict[str, int]  # MACs on its path: column, adapters, head


@dataclass(frozen=True)
class Projection:
    rule: GrowthRule
    tasks: list[ProjectedTask] = field(default_factory=list)


def _scaled(f: Figures, keep: float) -> Figures:
    if keep == 1:
        return f
    return Figures(round(f.params * keep), round(f.float_buffers * keep), round(f.macs * keep))


def _newest_classes(net: ProgressiveNet, classes: int | None) -> int:
    if classes is not None:
        if classes < 2:
            raise UsageError(f"a task needs at least 2 classes, got {classes}")
        return classes
    if not net.tasks:
        raise UsageError("the workspace has no task yet, so future tasks have no class count "
                         "to copy; pass --classes N")
    return net.task_info[net.tasks[-1]].classes


def default_width(net: ProgressiveNet) -> float:
    return net.column_info[-1].width if net.column_info else 1.0


def _meta_copy(net: ProgressiveNet, lateral: LateralSpec) -> ProgressiveNet:
    """The network's architecture on the meta device (shapes only, no memory)."""
    try:
        with torch.device("meta"):
            clone = ProgressiveNet.from_architecture(net.spec, net.architecture())
    except Exception:  # an adapter kind that cannot be rebuilt from the manifest alone
        clone = copy.deepcopy(net).to("meta")
        clone.meta, clone.attachments = {"history": [], "records": {}}, {}
    clone.spec = net.spec.model_copy(update={"lateral": lateral})
    return clone


def project(net: ProgressiveNet, n: int, width: float | None = None, mode: str = "column",
            classes: int | None = None, lateral: LateralSpec | None = None,
            base: NetworkCost | None = None, keep: float = 1.0) -> Projection:
    """Project ``n`` future tasks grown by the spec's rule (or the given what-if).

    ``width`` defaults to the newest column's width (the template's, 1.0, when there is
    none), ``classes`` to the newest task's; ``lateral`` replaces the spec's adapter
    policy for the future columns only (the existing ones keep theirs). ``keep`` < 1
    scales the parameters and MACs of future adapters, for the price of trimming at a
    measured rate; peak activations are then those of the untrimmed projection.
    """
    if not 0 <= keep <= 1:
        raise UsageError(f"keep must be a fraction in [0, 1], got {keep}")
    if not isinstance(n, int) or not 0 <= n <= MAX_PROJECT:
        raise UsageError(f"--project takes a number of future tasks from 0 to {MAX_PROJECT}, "
                         f"got {n}")
    if mode not in ("column", "head"):
        raise UsageError(f"unknown growth mode {mode!r}; use column or head")
    if mode == "head" and not net.columns:
        raise UsageError("head-only growth needs a column to sit on; grow a first task")
    if mode == "head" and width is not None:
        raise UsageError("--width applies to column growth only")
    w = float(width) if width is not None else default_width(net)
    if not 0 < w <= 16:
        raise UsageError(f"width must be a number in (0, 16], got {w}")
    check_width(net.spec, w)
    c = _newest_classes(net, classes)
    lat = lateral or net.spec.lateral
    spec = net.spec
    base = base or ledger_of(net)

    widths = [ci.width for ci in net.column_info]
    network = Figures(base.total.params.total, base.total.params.float_buffers, 0)
    macs_all = base.total.macs
    existing_columns = len(net.columns)

    if mode == "column":
        rule_base = column_figures(spec, w) + head_figures(plan_column(spec, w).out_shape[0], c)
        per = _block_adapters(spec, lat, w, w) + _head_adapter(spec, lat, w, c)
    else:
        carrier = len(net.columns) - 1
        rule_base = head_figures(_carrier_features(net, lat, carrier, c), c)
        for j in range(carrier):
            rule_base += _head_from_source(net, spec, lat, j, widths[j], c)
        per = Figures()
    rule = GrowthRule(mode, w if mode == "column" else widths[-1], c, lat.kind, rule_base, per)

    # The projected network is grown for real on the meta device (shapes, no memory): its
    # closures say which parts each future task's path holds, block by block (a head-only
    # task with no head adapters still reaches earlier columns through its carrier's own
    # adapters); the figures of those parts come from the live modules (existing parts,
    # as trimmed) or from the closed forms above (future parts).
    meta = _meta_copy(net, lat)
    names = set(net.tasks)
    out: list[ProjectedTask] = []
    for i in range(1, n + 1):
        name = f"future{i}"
        while name in names:
            name += "x"
        names.add(name)
        if mode == "column":
            k = len(widths)
            cf = column_figures(spec, w)
            adapters = Figures()
            for j in range(k):
                adapters += _from_source(net, spec, lat, j, widths[j], w)
            adapters = _scaled(adapters, keep)
            head = head_figures(plan_column(spec, w).out_shape[0], c)
            widths.append(w)
            carrier = k
            meta.add_column(name, c, width=w, seed=0)
        else:
            carrier = len(widths) - 1
            cf, adapters = Figures(), Figures()
            head = head_figures(_carrier_features(net, lat, carrier, c), c)
            meta.add_head(name, c, on=meta.column_info[carrier].task, seed=0)
        head_adapters = Figures()
        for j in range(carrier):
            head_adapters += _head_from_source(net, spec, lat, j, widths[j], c)
        head_adapters = _scaled(head_adapters, keep)
        added = cf + adapters + head + head_adapters
        meta.freeze()
        closure = meta.closure(name)
        path_cols, path_adapters = Figures(), Figures()
        for j in closure.columns:
            if j < existing_columns:
                path_cols += _measured_column(net, j, closure.depth(j))
            else:
                path_cols += column_figures(spec, widths[j], closure.depth(j))
        for key in closure.adapters:
            if key in net.adapters:
                path_adapters += _measured_adapter(net.adapters[key])
            else:
                path_adapters += _scaled(_future_adapter(meta, key, lat), keep)
        path = path_cols + path_adapters + head
        network = network + Figures(added.params, added.float_buffers, 0)
        macs_all += added.macs
        elements, _ = peak_activation(meta, closure.columns, [name], closure.depths)
        out.append(ProjectedTask(
            name, i, mode, carrier, widths[carrier], added, path, elements, network, macs_all,
            {"column": cf.params, "adapters": adapters.params + head_adapters.params,
             "head": head.params},
            {"column": path_cols.macs, "adapters": path_adapters.macs, "head": head.macs}))
    return Projection(rule, out)
