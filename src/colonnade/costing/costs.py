"""What each task costs: parameters, weight bytes, MACs and peak activation memory.

Every figure is derived from shapes (module hyperparameters and the network's input
shape); nothing runs a forward pass, so costs are exact, instant and device-free. The
figures are read from the *live* modules of each task's closure, so a pruned adapter
stops counting the moment it leaves the closure.

Conventions (stated in every output that shows them):

* MACs are the multiply-accumulates of dense and convolutional layers, including the
  lateral adapters' maps and the heads, for one sample (batch 1). FLOPs = 2 x MACs.
  Bias additions, the lateral sums, the nonlinear adapter's scalar scale alpha, norms,
  activations and pooling are elementwise work and count no MACs. This is the rule of
  ``torch.utils.flop_counter.FlopCounterMode``, which counts matmul and convolution
  only; the tests check every figure against it.
* Weight bytes are parameter elements times the element size: 4 (IEEE 754 binary32),
  2 (binary16), 2 (bfloat16, the upper half of a binary32) or 1 (int8; quantisation
  scales not included). Buffers (norm running statistics) are counted apart.
* Peak activation memory at batch 1: see ``peak_activation``.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field

import torch.nn as nn

from ..model.adapters import JointAdapter
from ..model.adopted import AdoptedColumn
from ..model.layers import Shape
from ..model.network import ProgressiveNet
from .adopted import adopted_cost
from .module_costs import (
    VIEWS,
    adapter_macs,
    adapter_steps,
    column_prefix,
    layer_macs,
    module_macs,
    module_output_shape,
)

__all__ = ["DTYPE_BYTES", "MAC_CONVENTION", "ACTIVATION_RULE", "ParamCount", "PathCost",
           "TaskCost", "NetworkCost", "module_output_shape", "layer_macs", "adapter_macs",
           "module_macs", "weight_bytes", "count_params", "peak_activation", "task_cost",
           "network_cost", "ledger_of", "part_of_task", "column_prefix"]

# Element sizes in bytes: IEEE 754 binary32 and binary16; bfloat16 keeps the upper 16
# bits of a binary32; int8 is one byte.
DTYPE_BYTES: dict[str, int] = {"fp32": 4, "fp16": 2, "bf16": 2, "int8": 1}

MAC_CONVENTION = ("MACs: multiply-accumulates of dense and conv layers (columns, lateral "
                  "adapters, heads) for one sample; FLOPs = 2 x MACs; bias adds, lateral "
                  "sums, alpha scaling, norms, activations and pooling count none, as in "
                  "torch.utils.flop_counter")
ACTIVATION_RULE = ("peak activation memory: the largest total size of the tensors alive at "
                   "once during one batch-1 forward pass in colonnade's execution order "
                   "(columns left to right, in each column its layers in order, each "
                   "block's lateral adapters in source order after its weighted layer "
                   "(a joint adapter first concatenates its sources; one that took in "
                   "a tap adapter adds its bridged tap's map to V's output before U), "
                   "then the heads); the input counts, every layer writes a new tensor "
                   "except flatten, dropout and identity (views), and a tensor is freed "
                   "right after its last reader; returned logits stay alive to the end; an "
                   "adopted column counts its input, its taps and its logits, not what it "
                   "holds inside")

def weight_bytes(elements: int) -> dict[str, int]:
    """Bytes of ``elements`` weights at each deployable dtype."""
    return {name: elements * size for name, size in DTYPE_BYTES.items()}


@dataclass(frozen=True)
class ParamCount:
    """Parameters split by part and by frozen state; buffers apart."""

    column: int = 0
    adapters: int = 0
    head: int = 0
    frozen: int = 0
    trainable: int = 0
    buffers: int = 0  # buffer elements (norm statistics, counters)
    buffer_bytes: int = 0  # at their stored dtypes
    float_buffers: int = 0  # floating buffer elements: what inference reads

    @property
    def total(self) -> int:
        return self.column + self.adapters + self.head

    @property
    def weight_bytes(self) -> dict[str, int]:
        return weight_bytes(self.total)

    def __add__(self, other: ParamCount) -> ParamCount:
        return ParamCount(*(a + b for a, b in zip(_fields(self), _fields(other), strict=True)))


def _fields(p: ParamCount) -> tuple[int, ...]:
    return (p.column, p.adapters, p.head, p.frozen, p.trainable, p.buffers, p.buffer_bytes,
            p.float_buffers)


def count_params(module: nn.Module, part: str) -> ParamCount:
    """``numel`` of a module's parameters as ``part`` (column, adapters or head)."""
    params = list(module.parameters())
    n = sum(p.numel() for p in params)
    trainable = sum(p.numel() for p in params if p.requires_grad)
    if isinstance(module, AdoptedColumn):  # its model's own count, all frozen (costing.adopted)
        n, trainable = adopted_cost(module).params, 0
    bufs = list(module.buffers())
    return ParamCount(**{part: n}, frozen=n - trainable, trainable=trainable,
                      buffers=sum(b.numel() for b in bufs),
                      buffer_bytes=sum(b.numel() * b.element_size() for b in bufs),
                      float_buffers=sum(b.numel() for b in bufs if b.is_floating_point()))


def _kind(part: str) -> str:
    return {"column": "column", "adapter": "adapters", "head": "head"}[part.split(":", 1)[0]]


def part_of_task(net: ProgressiveNet, part: str) -> str:
    """The task that brought a part: the grower of its column, or the head's task."""
    kind, name = part.split(":", 1)
    if kind == "column":
        return net.column_info[int(name)].task
    if kind == "head":
        return name
    info = net.adapter_info[name]
    return info.head if info.head is not None else net.column_info[info.column].task


# ----------------------------------------------------------------------------- activations
@dataclass
class _Trace:
    """Tensors (by id, with element counts) and the ops that read and write them."""

    sizes: list[int] = field(default_factory=list)
    ops: list[tuple[str, tuple[int, ...], int]] = field(default_factory=list)
    keep: set[int] = field(default_factory=set)

    def tensor(self, elements: int) -> int:
        self.sizes.append(elements)
        return len(self.sizes) - 1

    def op(self, label: str, inputs: Iterable[int], elements: int) -> int:
        out = self.tensor(elements)
        self.ops.append((label, tuple(inputs), out))
        return out

    def layer(self, label: str, module: nn.Module, t: int, shape: Shape) -> tuple[int, Shape]:
        """Apply a layer (or a Sequential, layer by layer); views write nothing."""
        if isinstance(module, nn.Sequential):
            for i, child in enumerate(module):
                t, shape = self.layer(f"{label}.{i}", child, t, shape)
            return t, shape
        out = module_output_shape(module, shape)
        if isinstance(module, VIEWS):
            return t, out
        return self.op(label, (t,), math.prod(out)), out

    def peak(self) -> tuple[int, str]:
        """Largest live total and the op where it occurs, freeing after last reads."""
        last: dict[int, int] = {}
        for i, (_, inputs, _) in enumerate(self.ops):
            for t in inputs:
                last[t] = i
        live = {0}  # the input
        total, best, where = self.sizes[0], self.sizes[0], "input"
        for i, (label, inputs, out) in enumerate(self.ops):
            live.add(out)
            total += self.sizes[out]
            if total > best:
                best, where = total, label
            for t in set(inputs) | {out}:
                if t in live and t not in self.keep and last.get(t, -1) <= i:
                    live.discard(t)
                    total -= self.sizes[t]
        return best, where


def _trace(net: ProgressiveNet, columns: Iterable[int], heads: Iterable[str],
           depths: dict[int, int] | None = None) -> _Trace:
    """The op list of ``run_columns`` over ``columns`` (each to its depth) then the heads."""
    tr = _Trace()
    shape0 = tuple(net.input_shape)
    x = tr.tensor(math.prod(shape0))
    outs: dict[int, list[tuple[int, Shape]]] = {}
    for k in sorted(columns):
        col = net.columns[k]
        if isinstance(col, AdoptedColumn):  # one step: its taps and logits, from the input
            outs[k] = [(tr.op(f"column {k} (adopted) output {i}", (x,), math.prod(b.out_shape)),
                        b.out_shape) for i, b in enumerate(col.plan.blocks)]
            continue
        h, shape = tr.layer(f"column {k} stem", col.stem, x, shape0)
        hs: list[tuple[int, Shape]] = []
        blocks = list(col.blocks)
        if depths is not None and k in depths:
            blocks = blocks[:depths[k]]
        for b, block in enumerate(blocks):
            z, zshape = tr.layer(f"column {k} block {b} weighted", block.weighted, h, shape)
            for key, _ in net.adapters_into_block(k, b):
                a = _trace_adapter(tr, net, key, [outs[j][net.adapter_reads(key, b - 1, j)][0]
                                                  for j in net.adapter_sources(key)])
                z = tr.op(f"column {k} block {b} lateral sum", (z, a), math.prod(zshape))
            h, shape = tr.layer(f"column {k} block {b} post", block.post, z, zshape)
            hs.append((h, shape))
        outs[k] = hs
    for task in heads:
        col = net.task_info[task].column
        h, shape = outs[col][net.head_reads(task)]
        logits, lshape = tr.layer(f"head {task}", net.heads[task], h, shape)
        for key, _ in net.adapters_into_head(task):
            a = _trace_adapter(tr, net, key, [outs[j][net.adapter_reads(key, -1, j)][0]
                                              for j in net.adapter_sources(key)])
            logits = tr.op(f"head {task} lateral sum", (logits, a), math.prod(lshape))
        tr.keep.add(logits)
    return tr


def _trace_adapter(tr: _Trace, net: ProgressiveNet, key: str, sources: list[int]) -> int:
    adapter = net.adapters[key]
    shape = tuple(adapter.source_shape)
    if isinstance(adapter, JointAdapter) and adapter.tap_shape is not None:
        return _trace_tap_joint(tr, key, adapter, sources[0], sources[1:])
    if len(sources) == 1:
        t = sources[0]
    else:  # a joint adapter reads its sources concatenated: a new tensor
        t = tr.op(f"adapter {key} concat", sources, math.prod(shape))
    for name, step in adapter_steps(adapter):
        if step is None:  # alpha * h: a new tensor of the source's shape
            t = tr.op(f"adapter {key} {name}", (t,), math.prod(shape))
        else:
            t, shape = tr.layer(f"adapter {key} {name}", step, t, shape)
    return t


def _trace_tap_joint(tr: _Trace, key: str, adapter: JointAdapter, tap: int,
                     columns: list[int]) -> int:
    """A joint adapter over a tap and columns: the columns concatenated (if several), V;
    the tap's bridge and T; their sum; U (model.adapters.JointAdapter.forward)."""
    shape = tuple(adapter.source_shape)
    t = columns[0] if len(columns) == 1 else tr.op(f"adapter {key} concat", columns,
                                                    math.prod(shape))
    v, vshape = tr.layer(f"adapter {key} V", adapter.V, t, shape)
    b, bshape = tap, tuple(adapter.tap_shape)
    if adapter.tap_bridge is not None:
        b, bshape = tr.layer(f"adapter {key} tap_bridge", adapter.tap_bridge, b, bshape)
    b, _ = tr.layer(f"adapter {key} T", adapter.T, b, bshape)
    z = tr.op(f"adapter {key} tap sum", (v, b), math.prod(vshape))
    return tr.layer(f"adapter {key} U", adapter.U, z, vshape)[0]


def peak_activation(net: ProgressiveNet, columns: Iterable[int], heads: Iterable[str],
                    depths: dict[int, int] | None = None) -> tuple[int, str]:
    """Peak activation elements at batch 1 and the op where it is reached.

    The rule, in full: walk the forward pass in colonnade's execution order (columns in
    increasing index; in each, the stem, then per block the weighted layer, each live
    lateral adapter into it in source order -- the concatenation of its sources if it
    reads several (a joint adapter), its scale, maps and activation -- and the sum into
    the block, then the block's other layers; then each head, its head adapters
    and their sums). Every step writes a new tensor, except flatten, dropout and identity,
    which are views. ``depths`` (a closure's) limits a column to its leading blocks, as
    the forward pass does. A tensor is alive from the step that writes it to the last step that
    reads it; the input is alive from the start; returned logits stay alive to the end.
    At each step, the tensors alive while it runs are its inputs, its output and every
    tensor still to be read later; the peak is the largest such total. Multiply by the
    element size for bytes. colonnade's own Python forward keeps block outputs longer
    than this (it returns them in a dict), so PyTorch's real footprint is higher; the
    figure is what a runtime that frees tensors after their last use needs.
    """
    return _trace(net, columns, heads, depths).peak()


# ----------------------------------------------------------------------------- task costs
@dataclass(frozen=True)
class PathCost:
    """What one inference path needs: a task's closure, or all tasks in one pass."""

    params: ParamCount
    macs: int
    macs_by_part: dict[str, int]
    activation_elements: int
    activation_peak_at: str

    @property
    def flops(self) -> int:
        return 2 * self.macs

    @property
    def weight_bytes(self) -> dict[str, int]:
        return self.params.weight_bytes

    @property
    def activation_bytes(self) -> dict[str, int]:
        return weight_bytes(self.activation_elements)


@dataclass(frozen=True)
class TaskCost:
    task: str
    mode: str
    column: int
    added: ParamCount  # the parts this task brought
    path: PathCost  # its closure


@dataclass(frozen=True)
class NetworkCost:
    tasks: list[TaskCost]
    total: PathCost  # the whole network, every task in one forward_all pass
    separate_macs: int  # the sum of every task's path MACs, run one at a time


def _parts(net: ProgressiveNet, columns: Iterable[int], adapters: Iterable[str],
           heads: Iterable[str], depths: dict[int, int] | None = None,
           ) -> Iterator[tuple[str, nn.Module, int]]:
    """(part id, module to count, MACs) of every part on a path; columns to their depth."""
    shape = tuple(net.input_shape)
    for k in columns:
        depth = None if depths is None else depths.get(k)
        col = net.columns[k]
        yield f"column:{k}", column_prefix(col, depth), module_macs(col, shape, depth)
    for key in adapters:
        yield f"adapter:{key}", net.adapters[key], module_macs(net.adapters[key], ())
    for name in heads:
        head = net.heads[name]
        yield f"head:{name}", head, module_macs(head, _head_shape(net, name))


def _head_shape(net: ProgressiveNet, task: str) -> Shape:
    """What a task's head reads: its column's last output, or an adopted column's tap."""
    col = net.columns[net.task_info[task].column]
    return tuple(col.plan.blocks[net.head_reads(task)].out_shape)


def _path(net: ProgressiveNet, columns: list[int], adapters: list[str], heads: list[str],
          depths: dict[int, int] | None = None) -> PathCost:
    params, by_part = ParamCount(), {"column": 0, "adapters": 0, "head": 0}
    for part, module, macs in _parts(net, columns, adapters, heads, depths):
        kind = _kind(part)
        params = params + count_params(module, kind)
        by_part[kind] += macs
    elements, where = peak_activation(net, columns, heads, depths)
    return PathCost(params, sum(by_part.values()), by_part, elements, where)


def task_cost(net: ProgressiveNet, task: str) -> TaskCost:
    """A task's costs: the parts it added, and its closure's inference path."""
    info = net.task(task)
    closure = net.closure(task)
    added = ParamCount()
    for part, module in net.part_modules():
        if part_of_task(net, part) == task:
            added = added + count_params(module, _kind(part))
    path = _path(net, list(closure.columns), list(closure.adapters), [task], closure.depths)
    return TaskCost(task, info.mode, info.column, added, path)


def network_cost(net: ProgressiveNet) -> PathCost:
    """The whole network: every part's parameters, and one ``forward_all`` pass.

    Parameters count every module the network holds; MACs and activations count what
    ``forward_all`` runs: every column, every live adapter, every head. Once a task is
    retired, both count only what the live tasks use: the parts only a retired task
    read are left out.
    """
    if len(net.live_tasks) < len(net.tasks):
        depths = net.live_depths()
        adapters = sorted({a for t in net.live_tasks for a in net.closure(t).adapters})
        return _path(net, sorted(depths), adapters, net.live_tasks, depths)
    live = [k for k, a in net.adapter_info.items() if a.state == "live" and k in net.adapters]
    cost = _path(net, list(range(len(net.columns))), live, net.tasks)
    held = ParamCount()
    for part, module in net.part_modules():
        held = held + count_params(module, _kind(part))
    return PathCost(held, cost.macs, cost.macs_by_part, cost.activation_elements,
                    cost.activation_peak_at)


def ledger_of(net: ProgressiveNet) -> NetworkCost:
    """Every task's costs and the whole network's, from the live modules."""
    tasks = [task_cost(net, t) for t in net.live_tasks]  # retired tasks cost nothing
    total = network_cost(net) if net.live_tasks else PathCost(
        ParamCount(), 0, {"column": 0, "adapters": 0, "head": 0}, 0, "input")
    return NetworkCost(tasks, total, sum(t.path.macs for t in tasks))
