"""Architecture diagrams: the networkx graph of ``graph.py`` drawn with graphviz.

The visual language, chosen so that it reads in greyscale and for colour-blind readers
(colours from the Okabe & Ito 2008 palette, and every state carried by shape, border and
a text badge as well as by fill):

* trainable parts: rounded boxes with a dashed border, light orange, badge TRAINABLE;
* frozen parts: square boxes with a solid border, light blue, badge FROZEN;
* sealed parts (inside a sealed task's closure): square boxes with a double border, a
  darker blue, badge SEALED;
* forward connections: dark grey arrows that set the layout; lateral adapters are drawn
  apart (they do not constrain the layout) in a colour and arrowhead per kind: linear
  blue with a hollow arrow, nonlinear vermillion with a diamond, others purple with a
  dot; dashed when trainable, a double line when sealed, thicker the higher their
  measured usage; pruned or merged adapters hidden, or dotted and faint on request.

graphviz (the Python package) is imported here only; without its ``dot`` program the
DOT source is still written and the caller is told how to install graphviz.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import networkx as nx

from ..errors import ColonnadeError, UsageError
from ..model.network import ProgressiveNet
from .draw_style import (
    FADED,
    FONT,
    FORWARD_COLOUR,
    KIND_STYLE,
    OTHER_KIND_STYLE,
    REMOVED_COLOUR,
    STATE_STYLE,
    badge_text,
    css_class,
    edge_id,
    esc,
    input_node,
    lateral_style,
    node_style,
    si,
    small,
    state_of,
    title_of,
    top_of,
    usage_width,
)
from .graph import INPUT, build_graph, closure_parts, column_graph
from .legend import Shown, legend_node

__all__ = ["to_dot", "format_of", "auto_compact", "GraphvizMissingError", "FORMATS",
           "DIRECTIONS", "AUTO_COMPACT_TASKS"]

FORMATS = ("svg", "png", "pdf", "dot")
DIRECTIONS = ("BT", "TB", "LR", "RL")  # graphviz rankdir: where data flows
INSTALL_HINT = "install graphviz (Debian: apt-get install graphviz)"
AUTO_COMPACT_TASKS = 8  # from this many tasks on, the full view is too wide to read


class GraphvizMissingError(ColonnadeError):
    """graphviz's ``dot`` program is missing: only the DOT source could be written."""


# ----------------------------------------------------------------------------- style
# Okabe & Ito (2008), "Color Universal Design": orange, sky blue, blue, vermillion,
# reddish purple; fills are light tints so that black text stays readable.
def _full(dot: Any, G: nx.DiGraph, focus: set[str] | None, show_removed: bool,
          flow: str) -> None:
    def faded(part: str | None) -> bool:
        return focus is not None and part is not None and part not in focus

    def node_faded(d: dict[str, Any]) -> bool:
        """A layer outside the blocks the focused task runs fades, even in its column."""
        if faded(d.get("part")):
            return True
        block = d.get("block")
        return (focus is not None and d.get("kind") == "layer" and block is not None
                and f"block:{d['column']}:{block}" not in focus)

    def mark(fade: bool) -> str:
        return "faded" if fade else "focus"

    shown = Shown()
    heads_on: dict[int, list[str]] = {}
    columns: dict[int, list[str]] = {}
    for n, d in G.nodes(data=True):
        if d["kind"] == "head":
            heads_on.setdefault(d["column"], []).append(n)
        elif d["kind"] == "layer":
            columns.setdefault(d["column"], []).append(n)
    input_node(dot, G.nodes[INPUT]["out_shape"])
    for k, nodes in columns.items():
        first = G.nodes[nodes[0]]
        state, fade = state_of(first), faded(first["part"])
        params = sum(G.nodes[n]["params"] for n in nodes)
        macs = sum(G.nodes[n]["macs"] for n in nodes)
        s = STATE_STYLE[state]
        shown.states.add(state)
        label = (f"<<B>column {k}: {esc(first['task'])}</B><BR/><B>{badge_text(first)}</B><BR/>"
                 f"{small(f'{params:,} params, {si(macs)} MACs', fade)}>")
        with dot.subgraph(name=f"cluster_c{k}") as c:
            c.attr(label=label, labeljust="c", labelloc=top_of(flow), fontname=FONT,
                   fontsize="11", fontcolor=FADED["font"] if fade else "black",
                   style="rounded,filled" + (",dashed" if state == "trainable" else ""),
                   fillcolor="#FFFFFF" if fade else s["cluster"],
                   color=FADED["line"] if fade else s["line"],
                   penwidth="2.4" if state == "sealed" and not fade else "1.2",
                   id=f"cluster_c{k}", **css_class(f"column {mark(fade)}"))
            for n in nodes:
                d = G.nodes[n]
                fade = node_faded(d)
                if d["weighted"]:
                    figures = f"{si(d['params'])} params, {si(d['macs'])} MACs"
                    label = f"<<B>{esc(d['label'])}</B><BR/>{small(figures, fade)}>"
                    size = {"fontsize": "11", "height": "0.45", "width": "1.7"}
                else:
                    label = esc(d["label"])
                    size = {"fontsize": "9", "height": "0.22", "width": "1.1"}
                c.node(n, label=label, id=n, fontname=FONT, margin="0.06,0.03",
                       tooltip=f"{d['module']}: {d['in_shape']} -> {d['out_shape']}",
                       **css_class(f"layer {mark(fade)}"), **size, **node_style(state, fade))
            for n in heads_on.get(k, []):
                d = G.nodes[n]
                hs, hf = state_of(d), faded(d["part"])
                shown.states.add(hs)
                text = f"{d['classes']} classes, {si(d['params'])} params"
                c.node(n, id=n, fontname=FONT, fontsize="11", width="1.7",
                       label=(f"<<B>head {esc(d['task'])}</B><BR/>{small(text, hf)}<BR/>"
                              f"{small('<B>' + STATE_STYLE[hs]['badge'] + '</B>', hf)}>"),
                       tooltip=f"{d['module']}: {d['in_shape']} -> {d['out_shape']}",
                       **css_class(f"head {mark(hf)}"), **node_style(hs, hf))
    top = max([d["usage"] for _u, _v, d in G.edges(data=True)
               if d.get("role") == "lateral" and d.get("usage") is not None] or [0.0])
    for u, v, d in G.edges(data=True):
        eid = edge_id(u, v, d)
        if d["role"] == "forward":
            fade = node_faded(G.nodes[u]) or node_faded(G.nodes[v])
            shown.forward = True
            dot.edge(u, v, id=eid, **css_class(f"forward {mark(fade)}"),
                     color=FADED["edge"] if fade else FORWARD_COLOUR, penwidth="1.2",
                     arrowsize="0.7", weight="8")
            continue
        live = d["state"] == "live"
        if not live and not show_removed:
            continue
        shown.removed |= not live
        if live:
            shown.lateral(d["kind"], state_of(d))
            shown.usage |= d["usage"] is not None and top > 0
        fade = faded(d["part"])
        attrs = lateral_style(d["kind"], state_of(d), live, fade, usage_width(d["usage"], top))
        tip = f"{d['key']} ({d['kind']}, {d['state']}): {d['params']:,} params, {d['macs']:,} MACs"
        if d["usage"] is not None:
            tip += f", usage {d['usage']:.3g}"
        if not live:
            attrs.update(xlabel=d["state"], fontsize="8", fontname=FONT)
        dot.edge(u, v, id=eid, tooltip=tip, arrowsize="0.8",
                 **css_class(f"lateral {d['state']} {mark(fade)}"), **attrs)
    # Beside the last column's first layer: the bottom corner, clear of the input's edges.
    last = columns[max(columns)][0] if columns else None
    legend_node(dot, shown, beside=last)


# ----------------------------------------------------------------------------- compact view
_PORTS = {"BT": ("n", "s"), "TB": ("s", "n"), "LR": ("e", "w"), "RL": ("w", "e")}


def _compact(dot: Any, G: nx.DiGraph, focus: set[str] | None, show_removed: bool,
             flow: str) -> None:
    """Columns on a diagonal, bundles as labelled boxes on a crossbar between them.

    Column j's output runs along its line past one box per later column k; each box
    bundles the adapters from j into k (blocks and heads) and feeds k along k's row.
    The input is drawn once: a bus beside the columns taps into each of them. The legend
    sits beside the last column's tap, in the corner the diagonal leaves empty. Edges of
    the crossbar are plain graphviz edges, so dot lays it out as a grid.
    """
    C = column_graph(G)
    out_port, in_port = _PORTS[flow]
    shown = Shown(forward=True, bundles=True)

    def faded(part: str | None) -> bool:
        return focus is not None and part is not None and part not in focus

    def mark(fade: bool) -> str:
        return "faded" if fade else "focus"

    cols = sorted((d["column"], n) for n, d in C.nodes(data=True) if d["kind"] == "column")
    for _k, n in cols:
        d = C.nodes[n]
        state, fade = state_of(d), faded(d["part"])
        shown.states.add(state)
        lines = [f"<B>column {d['column']}: {esc(d['task'])}</B>", f"<B>{badge_text(d)}</B>",
                 small(f"{d['params']:,} params, {si(d['macs'])} MACs", fade)]
        for h in d["heads"]:
            hf = fade or faded(h["part"])
            shown.states.add(state_of(h))
            lines.append(small(f"head {esc(h['task'])}: {h['classes']} classes, "
                                f"{STATE_STYLE[state_of(h)]['badge'].lower()}", hf))
        dot.node(n, id=n, label="<" + "<BR/>".join(lines) + ">", fontname=FONT,
                 fontsize="11", margin="0.12,0.06", **css_class(f"column {mark(fade)}"),
                 **node_style(state, fade))
    # The bundles that are drawn, by (source, target) column.
    top = max([d["usage"] for _u, _v, d in C.edges(data=True)
               if d.get("usage") is not None] or [0.0])
    cells: dict[tuple[int, int], dict[str, Any]] = {}
    for u, v, d in C.edges(data=True):
        if d["role"] == "lateral" and (d["count"] > 0 or (show_removed and d["removed"])):
            cells[C.nodes[u]["column"], C.nodes[v]["column"]] = d
    focused = {pair for pair, d in cells.items()
               if focus is None or set(d["parts"]) & focus}
    for (j, k), d in sorted(cells.items()):
        live = d["count"] > 0
        fade = (j, k) not in focused
        state = "sealed" if d["sealed"] else ("frozen" if d["frozen"] else "trainable")
        if live:
            for kind in d["kinds"]:
                shown.lateral(kind, state)
            shown.usage |= d["usage"] is not None and top > 0
        shown.removed |= bool(show_removed and d["removed"])
        color = (KIND_STYLE.get(d["kinds"][0], OTHER_KIND_STYLE)[0] if len(d["kinds"]) == 1
                 else OTHER_KIND_STYLE[0])
        what = d["kinds"][0] if len(d["kinds"]) == 1 else "adapters"
        text = [f"{d['count']} {what}", f"{si(d['params'])} params"] if live else []
        if d["usage"] is not None:
            text.append(f"usage {d['usage']:.2g}")
        if show_removed and d["removed"]:
            text.append(f"{d['removed']} removed")
        style = node_style(state, fade)
        style.update(fillcolor="#FFFFFF", color=FADED["line"] if fade else color,
                     penwidth=usage_width(d["usage"], top, 0.8, 2.6, 1.0) if live else "1.0")
        if not live:
            style.update(style="dotted", color=REMOVED_COLOUR, fontcolor=REMOVED_COLOUR)
        name = f"b{j}_{k}"
        dot.node(name, id=f"bundle:c{j}:c{k}", label="\n".join(text), fontname=FONT,
                 fontsize="7", height="0.3", width="0.8", margin="0.04,0.02",
                 tooltip=f"from column {j} into column {k}: {', '.join(d['keys']) or 'none live'}",
                 **css_class(f"bundle {mark(fade)}"), **style)
    # Rows: the bundles into column k, left to right by source, then column k, then the
    # point where the input bus taps into it.
    by_row: dict[int, list[int]] = {}
    for j, k in cells:
        by_row.setdefault(k, []).append(j)
    col_fade = {k: faded(C.nodes[n]["part"]) for k, n in cols}
    for k, n in cols:
        sources = sorted(by_row.get(k, []))
        tap = f"bus_c{k}"
        dot.node(tap, id=tap, label="", shape="point", width="0.05",
                 color=FADED["edge"] if col_fade[k] else FORWARD_COLOUR,
                 **css_class(f"input-bus {mark(col_fade[k])}"))
        row = [f"b{j}_{k}" for j in sources] + [n, tap]
        with dot.subgraph() as r:
            r.attr(rank="same")
            for name in row:
                r.node(name)
        for i, (a, b) in enumerate(zip(row, row[1:], strict=False)):
            if b == tap:  # drawn from the column to the tap, with the arrow at the column
                dot.edge(a, b, dir="back", id=f"forward:{INPUT}:{n}", penwidth="1.0",
                         color=FADED["edge"] if col_fade[k] else FORWARD_COLOUR,
                         arrowsize="0.6", minlen="2",
                         **css_class(f"forward {mark(col_fade[k])}"))
                continue
            d = cells[sources[i], k]
            live = d["count"] > 0
            fade = not any((j, k) in focused for j in sources[:i + 1])
            state = "sealed" if d["sealed"] else ("frozen" if d["frozen"] else "trainable")
            attrs = lateral_style(d["kinds"] or ["removed"], state, live, fade,
                                   usage_width(d["usage"], top, 0.6, 3.2))
            attrs.pop("constraint")
            if b != n:
                attrs["arrowhead"] = "none"
            dot.edge(a, b, id=f"row:{a}:{b}", **css_class(f"bundle-row {mark(fade)}"),
                     arrowsize="0.7", **attrs)
    # The input, once, and its bus up past every column's tap.
    input_node(dot, G.nodes[INPUT]["out_shape"], faded=all(col_fade.values()))
    bus = [INPUT] + [f"bus_c{k}" for k, _n in cols]
    for i, (a, b) in enumerate(zip(bus, bus[1:], strict=False)):
        fade = all(col_fade[k] for k, _n in cols[i:])
        ports = {"tailport": out_port} if a != INPUT else {}
        dot.edge(a, b, id=f"bus:{a}:{b}", arrowhead="none", weight="50", penwidth="1.2",
                 headport=in_port, color=FADED["edge"] if fade else FORWARD_COLOUR,
                 **ports, **css_class(f"input-bus {mark(fade)}"))
    # Lines: column j's output up past its bundles, one box per later column.
    by_line: dict[int, list[int]] = {}
    for j, k in cells:
        by_line.setdefault(j, []).append(k)
    for j, targets in by_line.items():
        targets.sort()
        line = [f"c{j}"] + [f"b{j}_{k}" for k in targets]
        for i, (a, b) in enumerate(zip(line, line[1:], strict=False)):
            fade = not any((j, k) in focused for k in targets[i:])
            dot.edge(a, b, id=f"line:{a}:{b}", tailport=out_port, headport=in_port,
                     arrowhead="none", weight="50", penwidth="1.1",
                     color=FADED["edge"] if fade else "#606060",
                     **css_class(f"bundle-line {mark(fade)}"))
    legend_node(dot, shown, beside=f"bus_c{cols[-1][0]}" if cols else None)


# ----------------------------------------------------------------------------- public
def auto_compact(net: ProgressiveNet, compact: bool | None) -> bool:
    """``compact`` as asked, or (None) compact from AUTO_COMPACT_TASKS tasks on."""
    return len(net.tasks) >= AUTO_COMPACT_TASKS if compact is None else bool(compact)


def to_dot(net: ProgressiveNet, task: str | None = None, compact: bool | None = None,
           direction: str = "BT", show_removed: bool = False, dpi: int | None = None,
           G: nx.DiGraph | None = None) -> Any:
    """A ``graphviz.Digraph`` of the network; ``task`` highlights its closure.

    ``compact=None`` chooses: the compact view from AUTO_COMPACT_TASKS tasks on.
    """
    import graphviz

    if direction not in DIRECTIONS:
        raise UsageError(f"unknown direction {direction!r}; use one of "
                         f"{', '.join(DIRECTIONS)}")
    compact = auto_compact(net, compact)
    focus = closure_parts(net, task) if task is not None else None
    G = build_graph(net) if G is None else G
    dot = graphviz.Digraph(name="colonnade")
    dot.attr(rankdir=direction, label=title_of(G, net, task, compact), labelloc="t",
             fontname=FONT, fontsize="13", nodesep="0.3" if not compact else "0.15",
             ranksep="0.28" if not compact else "0.25", newrank="true", bgcolor="white")
    if dpi is not None:
        dot.attr(dpi=str(dpi))
    dot.attr("edge", fontname=FONT)
    (_compact if compact else _full)(dot, G, focus, show_removed, direction)
    return dot


def format_of(output: Path) -> str:
    suffix = output.suffix.lower().lstrip(".")
    if suffix == "gv":
        suffix = "dot"
    if suffix not in FORMATS:
        raise UsageError(f"{output}: unknown diagram format {output.suffix or '(none)'!r}; "
                         f"name the file .svg, .png, .pdf or .dot")
    return suffix

