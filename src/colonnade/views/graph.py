"""The grown network as a networkx graph, built from the modules themselves.

``build_graph(net)`` returns a ``DiGraph`` with one node for the input, one for every
layer of every column (stem layers and each block's weighted and unweighted layers, in
template order) and one for every head; one edge for every forward connection and one
for every lateral adapter, live or not. Drawing is apart from this (``draw.py``), so the
graph can be analysed with networkx directly and the picture never drifts from it.

``colonnade.graph`` is this module, made callable so that ``colonnade.graph(net)`` is
``build_graph(net)``: a plain function of the same name would shadow the module and
break ``import colonnade.graph`` and attribute patching.
"""

from __future__ import annotations

import math
import sys
import types
from typing import Any

import networkx as nx
import torch.nn as nn

from ..costing.adopted import adopted_cost
from ..costing.costs import layer_macs, module_macs
from ..model.adopted import AdoptedColumn
from ..model.guard import sealed_parts, sealed_tasks
from ..model.layers import layer_output_shape
from ..model.network import ProgressiveNet
from ..model.schema import Act, Conv1d, Conv2d, Dense, Dropout, Flatten, LayerSpec, Norm, Pool

__all__ = ["build_graph", "column_graph", "layer_label", "closure_parts", "INPUT"]

INPUT = "input"

# ----------------------------------------------------------------------------- labels
def layer_label(layer: LayerSpec, out_shape: tuple[int, ...]) -> tuple[str, str]:
    """(op, short text) of a template layer as built, widths scaled by the column."""
    if isinstance(layer, Dense):
        return "dense", f"dense {out_shape[0]}"
    if isinstance(layer, (Conv1d, Conv2d)):
        op = "conv1d" if isinstance(layer, Conv1d) else "conv2d"
        extra = f" k{layer.kernel}"
        if layer.stride != 1:
            extra += f" s{layer.stride}"
        if layer.padding:
            extra += f" p{layer.padding}"
        return op, f"{op} {out_shape[0]}{extra}"
    if isinstance(layer, Norm):
        return "norm", f"{layer.norm} norm"
    if isinstance(layer, Act):
        return "act", layer.act
    if isinstance(layer, Dropout):
        return "dropout", f"dropout {layer.dropout:g}"
    if isinstance(layer, Pool):
        if layer.pool == "global_avg":
            return "pool", "global avg pool"
        return "pool", f"{layer.pool} pool {layer.size}"
    if isinstance(layer, Flatten):
        return "flatten", "flatten"
    return type(layer).__name__.lower(), type(layer).__name__.lower()


# ----------------------------------------------------------------------------- figures
def _count(module: nn.Module | None) -> tuple[int, int]:
    """(parameters, buffer elements) of a module, by ``numel``."""
    if module is None:
        return 0, 0
    return (sum(p.numel() for p in module.parameters()),
            sum(b.numel() for b in module.buffers()))


# ----------------------------------------------------------------------------- state
def _sealed(net: ProgressiveNet) -> tuple[list[str], dict[str, list[str]]]:
    """Sealed tasks, and part id -> the sealed tasks whose closure holds it.

    The seal guard is the authority on what is sealed.
    """
    tasks = list(sealed_tasks(net))
    owners: dict[str, list[str]] = {}
    for part, (task, _entry) in sealed_parts(net).items():
        owners.setdefault(part, []).append(task)
    for task in tasks:
        if task not in net.task_info:
            continue
        c = net.closure(task)
        for part in ([f"column:{k}" for k in c.columns] + [f"adapter:{a}" for a in c.adapters]
                     + [f"head:{task}"]):
            if task not in owners.setdefault(part, []):
                owners[part].append(task)
    return tasks, owners


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def _usage(net: ProgressiveNet, key: str, task: str) -> float | None:
    """An adapter's usage score when one was measured, else None.

    Read from ``adapter_info[key].extra["usage"]`` or ``net.meta["usage"]`` (keyed by
    adapter, or by task then adapter); a score may be a number or a mapping with a
    ``score`` field.
    """
    def pick(value: Any) -> float | None:
        if isinstance(value, dict):
            value = value.get("score")
        return _number(value)

    info = net.adapter_info[key]
    found = pick(info.extra.get("usage")) if isinstance(info.extra, dict) else None
    if found is not None:
        return found
    table = net.meta.get("usage")
    if not isinstance(table, dict):
        return None
    if key in table:
        return pick(table[key])
    per_task = table.get(task)
    if isinstance(per_task, dict):
        scores = per_task.get("adapters", per_task)
        if isinstance(scores, dict) and key in scores:
            return pick(scores[key])
    return None


# ----------------------------------------------------------------------------- the graph
def _column_layers(net: ProgressiveNet, k: int) -> list[dict[str, Any]]:
    """Every layer of column k, in order, with its module name, shapes and position."""
    col, spec = net.columns[k], net.spec
    width = col.width
    layers = []
    shape = tuple(spec.input)
    for i, layer in enumerate(col.plan.stem):
        out = layer_output_shape(layer, shape, width)
        layers.append({"id": f"c{k}_s{i}", "module": f"columns.{k}.stem.{i}", "layer": layer,
                       "block": None, "position": 0, "template": i, "in": shape, "out": out})
        shape = out
    for b, plan in enumerate(col.plan.blocks):
        layers.append({"id": f"c{k}_b{b}_0", "module": f"columns.{k}.blocks.{b}.weighted",
                       "layer": plan.weighted, "block": b, "position": 0,
                       "template": plan.template_index, "in": plan.in_shape,
                       "out": plan.pre_shape})
        shape = plan.pre_shape
        for j, layer in enumerate(plan.post):
            out = layer_output_shape(layer, shape, width)
            layers.append({"id": f"c{k}_b{b}_{j + 1}", "module": f"columns.{k}.blocks.{b}.post.{j}",
                           "layer": layer, "block": b, "position": j + 1,
                           "template": plan.template_index + j + 1, "in": shape, "out": out})
            shape = out
    return layers


def _block_ends(layers: list[dict[str, Any]]) -> dict[int, str]:
    """Block index -> id of its last layer (where its output leaves)."""
    ends: dict[int, str] = {}
    for layer in layers:
        if layer["block"] is not None:
            ends[layer["block"]] = layer["id"]
    return ends


def _module(net: ProgressiveNet, dotted: str) -> nn.Module | None:
    try:
        return net.get_submodule(dotted)
    except AttributeError:
        return None


def _add_adopted(G: nx.DiGraph, net: ProgressiveNet, col: AdoptedColumn, task: str,
                 state: dict[str, Any]) -> dict[int, str]:
    """An adopted column as one labelled box (the model) and one node per tap.

    Returns output index -> node: the taps in order, then the model (its logits)."""
    record, cost = col.record, adopted_cost(col)
    model = "c0_model"
    G.add_node(model, kind="layer", part="column:0", module="columns.0", column=0, task=task,
               block=None, position=0, template=None, op="adopted", adopted=True,
               label=f"adopted {record.format} model ({record.runtime} "
                     f"{record.runtime_version})",
               weighted=True, in_shape=list(record.input), out_shape=[record.classes],
               params=cost.params, buffers=0, macs=cost.macs, macs_source=cost.source,
               **state)
    G.add_edge(INPUT, model, role="forward", kind="forward", shape=list(record.input))
    ends = {}
    for i, (tap, shape) in enumerate(zip(record.taps, record.tap_shapes, strict=True)):
        node = f"c0_t{i}"
        G.add_node(node, kind="layer", part="column:0", module="columns.0", column=0,
                   task=task, block=i, position=0, template=None, op="tap", adopted=True,
                   label=f"tap {tap}", weighted=False, in_shape=list(shape),
                   out_shape=list(shape), params=0, buffers=0, macs=0, **state)
        G.add_edge(model, node, role="forward", kind="forward", shape=list(shape))
        ends[i] = node
    ends[len(record.taps)] = model
    return ends


def build_graph(net: ProgressiveNet) -> nx.DiGraph:
    """The network as a DiGraph: input, column layers and heads; forward and lateral edges.

    Node attributes: ``kind`` (input, layer, head), ``part`` (``column:K`` or
    ``head:TASK``, as ``net.part_modules`` names it), ``module`` (the dotted module name),
    ``column``, ``task``, ``op``, ``label``, ``in_shape``, ``out_shape``, ``params``,
    ``buffers``, ``macs`` (per sample, by the rule of ``costs.py``), ``frozen``, ``sealed``,
    ``sealed_by``.
    Edge attributes: ``role`` (forward or lateral) and ``kind`` (forward, or the adapter
    kind); lateral edges add ``key``, ``part``, ``module``, ``state`` (live, pruned,
    merged, ...), ``params``, ``macs``, ``frozen``, ``sealed``, ``sealed_by``, ``usage``
    (None when not measured), ``source``, ``target``. A lateral edge runs from the last
    layer of the source block to the target's weighted layer (its output is where the
    adapter adds) or to the head. An adapter over several sources (``extra["sources"]``)
    has one edge per source; its figures sit on the edge of its first source.
    When two adapters share both ends, the live one keeps the edge and lists the others
    in ``replaces``. Graph attributes: ``spec``, ``input``, ``tasks``, ``sealed``,
    ``lateral``, ``adapters`` (key -> figures of every adapter, the per-adapter table).
    """
    sealed_tasks, owners = _sealed(net)

    def state_of(part: str) -> dict[str, Any]:
        by = owners.get(part, [])
        return {"frozen": not net.is_trainable(part), "sealed": bool(by), "sealed_by": list(by)}

    G = nx.DiGraph(spec=net.spec.name, input=list(net.input_shape), tasks=net.tasks,
                   sealed=sealed_tasks, lateral=net.spec.lateral.kind, adapters={})
    G.add_node(INPUT, kind="input", part=None, label="input", out_shape=list(net.input_shape),
               params=0, buffers=0, macs=0, frozen=True, sealed=False, sealed_by=[])
    ends: dict[int, dict[int, str]] = {}
    last: dict[int, str] = {}
    for k, info in enumerate(net.column_info):
        part = f"column:{k}"
        if isinstance(net.columns[k], AdoptedColumn):
            ends[k] = _add_adopted(G, net, net.columns[k], info.task, state_of(part))
            last[k] = ends[k][len(ends[k]) - 1]
            continue
        layers = _column_layers(net, k)
        ends[k] = _block_ends(layers)
        prev = INPUT
        for layer in layers:
            op, text = layer_label(layer["layer"], layer["out"])
            module = _module(net, layer["module"])
            params, buffers = _count(module)
            G.add_node(layer["id"], kind="layer", part=part, module=layer["module"], column=k,
                       task=info.task, block=layer["block"], position=layer["position"],
                       template=layer["template"], op=op, label=text,
                       weighted=bool(layer["layer"].weighted), in_shape=list(layer["in"]),
                       out_shape=list(layer["out"]), params=params, buffers=buffers,
                       macs=layer_macs(module, tuple(layer["in"])), **state_of(part))
            G.add_edge(prev, layer["id"], role="forward", kind="forward",
                       shape=list(layer["in"]))
            prev = layer["id"]
        last[k] = prev
    for name, t in net.task_info.items():
        part = f"head:{name}"
        params, buffers = _count(net.heads[name])
        node = f"head_{name}"
        reads = net.head_reads(name)
        shape = list(net.columns[t.column].plan.blocks[reads].out_shape)
        G.add_node(node, kind="head", part=part, module=f"heads.{name}", column=t.column,
                   task=name, mode=t.mode, classes=t.classes, label=f"head {name}",
                   op="identity" if t.mode == "adopted" else "dense", in_shape=shape,
                   out_shape=[t.classes], params=params, buffers=buffers,
                   macs=layer_macs(net.heads[name], tuple(shape)), **state_of(part))
        G.add_edge(ends[t.column][reads] if t.column in ends and reads in ends[t.column]
                   else last[t.column], node, role="forward", kind="forward", shape=shape)
    for key, a in net.adapter_info.items():
        module = net.adapters[key] if key in net.adapters else None
        params, _ = _count(module)
        part = f"adapter:{key}"
        task = a.head if a.head is not None else net.column_info[a.column].task
        figures = {"kind": a.kind, "state": a.state, "params": params,
                   "macs": module_macs(module, ()) if module is not None else 0,
                   "usage": _usage(net, key, task),
                   "source": a.source, "target": a.target, "column": a.column,
                   "block": a.block, "head": a.head, **state_of(part)}
        G.graph["adapters"][key] = dict(figures)
        sources = _sources(net, key)
        for n, j in enumerate(sources):
            # A tap is read of the adopted column 0 only; a joint adapter's other sources
            # read their usual block.
            tap = a.extra.get("tap") if isinstance(a.extra, dict) and j == 0 else None
            if a.head is not None:
                u, v = (last[j] if tap is None else ends[j][tap]), f"head_{a.head}"
            else:
                u = ends[j][a.block - 1 if tap is None else tap]
                v = f"c{a.column}_b{a.block}_0"
            attrs = {"role": "lateral", "key": key, "part": part, "module": f"adapters.{key}",
                     **figures, "replaces": []}
            if n > 0:
                attrs.update(params=0, macs=0)
            _add_lateral(G, u, v, attrs)
    return G


def _sources(net: ProgressiveNet, key: str) -> list[int]:
    """The columns an adapter reads: several for a joint adapter (the result of a merge)."""
    if key in net.adapters and hasattr(net, "adapter_sources"):
        return list(net.adapter_sources(key))
    info = net.adapter_info[key]
    listed = info.extra.get("sources") if isinstance(info.extra, dict) else None
    if isinstance(listed, list) and listed:
        return [int(j) for j in listed]
    return [info.source]


def _add_lateral(G: nx.DiGraph, u: str, v: str, attrs: dict[str, Any]) -> None:
    """Add a lateral edge; of two adapters with the same ends the live one keeps it."""
    if not G.has_edge(u, v):
        G.add_edge(u, v, **attrs)
        return
    old = G.edges[u, v]
    if attrs["state"] == "live" and old.get("state") != "live":
        attrs["replaces"] = [old["key"], *old.get("replaces", [])]
        G.remove_edge(u, v)
        G.add_edge(u, v, **attrs)
    else:
        old.setdefault("replaces", []).append(attrs["key"])


# ----------------------------------------------------------------------------- views
def closure_parts(net: ProgressiveNet, task: str) -> set[str]:
    """Part ids of a task's closure: its columns, live adapters and head, and one
    ``block:K:B`` id per column block it runs (a column may be in it only in part)."""
    c = net.closure(task)
    return ({f"column:{k}" for k in c.columns} | {f"adapter:{a}" for a in c.adapters}
            | {f"head:{c.head}"}
            | {f"block:{k}:{b}" for k in c.columns for b in range(c.depth(k))})


def column_graph(G: nx.DiGraph) -> nx.DiGraph:
    """One node per column, one edge per pair of columns bundling the adapters between.

    Column nodes sum their layers' figures and list their heads. A bundle edge from
    column j to column k gathers every adapter from j into k's blocks or into a head on
    k: ``count`` (live ones), ``removed`` (pruned, merged, ...), ``keys`` and ``parts``
    (live), ``kinds``, ``params``, ``macs``, ``usage`` (sum of measured scores, None when
    none was measured), ``frozen`` and ``sealed`` (true when true of every live one).
    """
    C = nx.DiGraph(**{k: v for k, v in G.graph.items() if k != "adapters"})
    C.add_node(INPUT, **G.nodes[INPUT])
    for _node, d in G.nodes(data=True):
        if d["kind"] != "layer":
            continue
        cid = f"c{d['column']}"
        if cid not in C:
            C.add_node(cid, kind="column", part=d["part"], column=d["column"], task=d["task"],
                       layers=0, params=0, buffers=0, macs=0, frozen=d["frozen"],
                       sealed=d["sealed"], sealed_by=list(d["sealed_by"]), heads=[])
            C.add_edge(INPUT, cid, role="forward", kind="forward", shape=G.graph["input"])
        c = C.nodes[cid]
        c["layers"] += 1
        for f in ("params", "buffers", "macs"):
            c[f] += d[f]
        c["out_shape"] = d["out_shape"]
    for node, d in G.nodes(data=True):
        if d["kind"] == "head":
            C.nodes[f"c{d['column']}"]["heads"].append({"node": node, **d})
    for u, v, d in G.edges(data=True):
        if d["role"] != "lateral":
            continue
        pair = (f"c{G.nodes[u]['column']}", f"c{G.nodes[v]['column']}")
        if not C.has_edge(*pair):
            C.add_edge(*pair, role="lateral", count=0, removed=0, keys=[], parts=[], kinds=[],
                       params=0, macs=0, usage=None, frozen=True, sealed=True)
        e = C.edges[pair]
        if d["state"] != "live":
            e["removed"] += 1
            continue
        e["count"] += 1
        e["keys"].append(d["key"])
        e["parts"].append(d["part"])
        if d["kind"] not in e["kinds"]:
            e["kinds"].append(d["kind"])
        e["params"] += d["params"]
        e["macs"] += d["macs"]
        if d["usage"] is not None:
            e["usage"] = (e["usage"] or 0.0) + d["usage"]
        e["frozen"] = e["frozen"] and d["frozen"]
        e["sealed"] = e["sealed"] and d["sealed"]
    return C


# ----------------------------------------------------------------------------- callable module
class _CallableModule(types.ModuleType):
    """Lets ``colonnade.graph(net)`` call ``build_graph`` while staying a module."""

    def __call__(self, net: ProgressiveNet) -> nx.DiGraph:
        return build_graph(net)


sys.modules[__name__].__class__ = _CallableModule
