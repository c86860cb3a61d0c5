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

import html
from pathlib import Path
from typing import Any

import networkx as nx

from .errors import ColonnadeError, UsageError
from .graph import INPUT, build_graph, closure_parts, column_graph
from .network import ProgressiveNet
from .store import atomic_write, load

__all__ = ["to_dot", "render", "draw_workspace", "GraphvizMissingError", "FORMATS",
           "DIRECTIONS"]

FORMATS = ("svg", "png", "pdf", "dot")
DIRECTIONS = ("BT", "TB", "LR", "RL")  # graphviz rankdir: where data flows
INSTALL_HINT = "install graphviz (Debian: apt-get install graphviz)"


class GraphvizMissingError(ColonnadeError):
    """graphviz's ``dot`` program is missing: only the DOT source could be written."""


# ----------------------------------------------------------------------------- style
# Okabe & Ito (2008), "Color Universal Design": orange, sky blue, blue, vermillion,
# reddish purple; fills are light tints so that black text stays readable.
_STATE = {
    "trainable": {"fill": "#FCE3C2", "line": "#A35200", "shape": "box",
                  "style": "rounded,dashed,filled", "peripheries": "1", "penwidth": "1.6",
                  "badge": "TRAINABLE", "cluster": "#FFF6EB"},
    "frozen": {"fill": "#DCEBF7", "line": "#2F5F8A", "shape": "box", "style": "filled",
               "peripheries": "1", "penwidth": "1.0", "badge": "FROZEN", "cluster": "#F3F8FC"},
    "sealed": {"fill": "#A9C7E3", "line": "#16324D", "shape": "box", "style": "filled",
               "peripheries": "2", "penwidth": "1.0", "badge": "SEALED", "cluster": "#E3EDF6"},
}
_KIND = {"linear": ("#0072B2", "onormal"), "nonlinear": ("#D55E00", "diamond")}
_OTHER_KIND = ("#CC79A7", "dot")
_FORWARD = "#404040"
_FADED = {"fill": "#F7F7F7", "line": "#C4C4C4", "font": "#A6A6A6", "edge": "#D4D4D4"}
_REMOVED = "#B8B8B8"
_FONT = "Helvetica"


def _top(flow: str) -> str:
    """Cluster ``labelloc`` that puts a label at the top of the page: dot flips it for BT."""
    return "b" if flow == "BT" else "t"


def _cls(names: str) -> dict[str, str]:
    """The SVG ``class`` of an element (a Python keyword, so passed through a dict)."""
    return {"class": names}


def _state(d: dict[str, Any]) -> str:
    if d.get("sealed"):
        return "sealed"
    return "frozen" if d.get("frozen", True) else "trainable"


def _si(n: int | float) -> str:
    """12345 -> '12.3k': figures short enough for a node label."""
    n = float(n)
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.3g}{unit}"
    return f"{n:.0f}"


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _small(text: str, faded: bool = False, size: int = 8) -> str:
    color = f' COLOR="{_FADED["font"]}"' if faded else ""
    return f'<FONT POINT-SIZE="{size}"{color}>{text}</FONT>'


def _node_style(state: str, faded: bool) -> dict[str, str]:
    s = _STATE[state]
    attrs = {"shape": s["shape"], "style": s["style"], "peripheries": s["peripheries"],
             "penwidth": s["penwidth"], "fillcolor": s["fill"], "color": s["line"],
             "fontcolor": "black"}
    if faded:
        attrs.update(fillcolor=_FADED["fill"], color=_FADED["line"],
                     fontcolor=_FADED["font"])
    return attrs


def _usage_width(usage: float | None, top: float, low: float = 0.6, high: float = 4.6,
                 unmeasured: float = 1.4) -> str:
    """Pen width by measured usage, from ``low`` (unused) to ``high`` (the most used)."""
    if usage is None or top <= 0:
        return f"{unmeasured:g}"
    return f"{low + (high - low) * max(usage, 0.0) / top:.2f}"


def _lateral_style(kind: str | list[str], state: str, live: bool, faded: bool,
                   width: str) -> dict[str, str]:
    kinds = kind if isinstance(kind, list) else [kind]
    color, arrow = _KIND.get(kinds[0], _OTHER_KIND) if len(kinds) == 1 else _OTHER_KIND
    if not live:
        return {"color": _REMOVED, "fontcolor": _REMOVED, "style": "dotted",
                "arrowhead": arrow, "penwidth": "1.0", "constraint": "false"}
    if faded:
        color = _FADED["edge"]
    style = "dashed" if state == "trainable" else "solid"
    line = f"{color}:invis:{color}" if state == "sealed" else color
    return {"color": line, "fontcolor": _FADED["font"] if faded else color, "style": style,
            "arrowhead": arrow, "penwidth": width, "constraint": "false"}


# ----------------------------------------------------------------------------- pieces
def _title(G: nx.DiGraph, net: ProgressiveNet, task: str | None, compact: bool) -> str:
    params = sum(p.numel() for p in net.parameters())
    macs = sum(d.get("macs", 0) for _n, d in G.nodes(data=True))
    macs += sum(d.get("macs", 0) for _u, _v, d in G.edges(data=True))
    n = len(net.tasks)
    line = (f"<B>{_e(net.spec.name)}</B>: input {list(net.input_shape)}, "
            f"{n} task{'s' * (n != 1)}, {len(net.columns)} "
            f"column{'s' * (len(net.columns) != 1)}, {params:,} parameters, "
            f"{_si(macs)} MACs per sample (all tasks)")
    sealed = G.graph.get("sealed") or []
    if sealed:
        line += f"<BR/>sealed: {_e(_names(sealed, 8))}"
    if task is not None:
        c = net.closure(task)
        cols = [str(k) for k in c.columns]
        cols_text = cols[0] if len(cols) == 1 else ", ".join(cols[:-1]) + " and " + cols[-1]
        line += (f"<BR/>focus: task {_e(task)} runs column{'s' * (len(cols) != 1)} "
                 f"{cols_text} with {len(c.adapters)} lateral "
                 f"adapter{'s' * (len(c.adapters) != 1)} and its head; the rest is faded")
    if compact:
        line += "<BR/>" + _small(
            "one box per column; a small box where column j's line meets column k's row "
            "bundles the lateral adapters from column j into column k", size=10)
    return f"<{line}>"


def _names(names: list[str], most: int) -> str:
    shown = ", ".join(names[:most])
    return shown + (f" and {len(names) - most} more" if len(names) > most else "")


def _legend(dot: Any, kinds: list[str], show_removed: bool, usage: bool, flow: str,
            stacked: bool) -> None:
    """Samples of every state and line in use, in a cluster of their own.

    ``stacked``: one sample per rank, chained so that they read from the top (or left)
    whatever the flow; beside a tall drawing. Otherwise two ranks: node states in one,
    lines in the other; under a wide, flat drawing.
    """
    states = [("trainable", "TRAINABLE: being trained"),
              ("frozen", "FROZEN: never trained again"),
              ("sealed", "SEALED: in a sealed closure")]
    lines: list[tuple[str, str, dict[str, str]]] = [
        ("forward", "forward (input to head)",
         {"color": _FORWARD, "penwidth": "1.2", "arrowhead": "normal"})]
    for kind in kinds:
        color, arrow = _KIND.get(kind, _OTHER_KIND)
        lines.append((f"kind_{kind}", f"{kind} adapter",
                      {"color": color, "arrowhead": arrow, "penwidth": "1.4"}))
    lines.append(("trainable_adapter", "trainable adapter (dashed)",
                  {"color": "#000000", "style": "dashed", "penwidth": "1.4"}))
    lines.append(("sealed_adapter", "sealed adapter (double line)",
                  {"color": "#000000:invis:#000000", "penwidth": "1.0"}))
    if show_removed:
        lines.append(("removed", "pruned or merged (dotted)",
                      {"color": _REMOVED, "style": "dotted", "penwidth": "1.0"}))
    if usage:
        lines.append(("usage", "wider: higher measured usage",
                      {"color": "#000000", "penwidth": "4.0"}))

    def state_node(g: Any, state: str, text: str) -> str:
        name = f"legend_{state}"
        g.node(name, label=text, id=name, fontname=_FONT, fontsize="9", height="0.3",
               **_node_style(state, False))
        return name

    def line_sample(g: Any, name: str, text: str, edge: dict[str, str]) -> tuple[str, str]:
        tail, head = f"legend_{name}", f"legend_{name}_text"
        # Equal-width, left-aligned text so that stacked samples line up.
        cell = (f'<<TABLE BORDER="0" CELLPADDING="0"><TR><TD WIDTH="150" ALIGN="LEFT">'
                f'{_e(text)}</TD></TR></TABLE>>')
        g.node(tail, label="", shape="point", width="0.04", color="#808080", id=tail)
        g.node(head, label=cell, shape="plaintext", fontname=_FONT, fontsize="9",
               height="0.2", id=head)
        g.edge(tail, head, id=f"legend_edge_{name}", minlen="2", **edge)
        return tail, head

    with dot.subgraph(name="cluster_legend") as lg:
        lg.attr(label="<<B>legend</B>>", style="rounded", color="#808080", fontname=_FONT,
                fontsize="11", labeljust="l", labelloc=_top(flow), penwidth="1.0",
                fillcolor="white", id="cluster_legend")
        if stacked:
            rows: list[tuple[str, ...]] = [(s, t) for s, t in states]
            rows += [(n, t, e) for n, t, e in lines]  # type: ignore[misc]
            if flow in ("BT", "RL"):  # the chain grows against the reading order
                rows.reverse()
            previous = None
            for item in rows:
                with lg.subgraph() as row:
                    row.attr(rank="same")
                    anchor = (state_node(row, item[0], item[1]) if len(item) == 2
                              else line_sample(row, *item)[0])  # type: ignore[arg-type]
                if previous is not None:
                    lg.edge(previous, anchor, style="invis", id=f"legend_order_{item[0]}")
                previous = anchor
            return
        with lg.subgraph() as row:
            row.attr(rank="same")
            previous = None
            for state, text in states:
                name = state_node(row, state, text)
                if previous is not None:
                    row.edge(previous, name, style="invis", id=f"legend_order_{state}")
                previous = name
        with lg.subgraph() as row:
            row.attr(rank="same")
            previous = None
            for name, text, edge in lines:
                tail, head = line_sample(row, name, text, edge)
                if previous is not None:
                    row.edge(previous, tail, style="invis", id=f"legend_order_{name}")
                previous = head
        lg.edge("legend_trainable", "legend_forward", style="invis", id="legend_rows")


def _edge_id(u: str, v: str, d: dict[str, Any]) -> str:
    return f"lateral:{d['key']}" if d.get("role") == "lateral" else f"forward:{u}:{v}"


def _input_node(dot: Any, shape: list[int]) -> None:
    dot.node(INPUT, id=INPUT, **_cls("input focus"),
             label=f"<<B>input</B><BR/>{_small(_e(shape))}>", shape="oval", style="filled",
             fillcolor="#FFFFFF", color="#404040", fontname=_FONT, fontsize="11")


def _badge(d: dict[str, Any]) -> str:
    """The text badge; a sealed part also names its seal, or counts several."""
    state = _state(d)
    badge = _STATE[state]["badge"]
    by = d.get("sealed_by") or []
    if state == "sealed" and by:
        badge += f" by {_e(' and '.join(by))}" if len(by) <= 2 else f" by {len(by)} tasks"
    return badge


# ----------------------------------------------------------------------------- full view
def _full(dot: Any, G: nx.DiGraph, focus: set[str] | None, show_removed: bool,
          flow: str) -> None:
    def faded(part: str | None) -> bool:
        return focus is not None and part is not None and part not in focus

    def mark(fade: bool) -> str:
        return "faded" if fade else "focus"

    heads_on: dict[int, list[str]] = {}
    columns: dict[int, list[str]] = {}
    for n, d in G.nodes(data=True):
        if d["kind"] == "head":
            heads_on.setdefault(d["column"], []).append(n)
        elif d["kind"] == "layer":
            columns.setdefault(d["column"], []).append(n)
    _input_node(dot, G.nodes[INPUT]["out_shape"])
    for k, nodes in columns.items():
        first = G.nodes[nodes[0]]
        state, fade = _state(first), faded(first["part"])
        params = sum(G.nodes[n]["params"] for n in nodes)
        macs = sum(G.nodes[n]["macs"] for n in nodes)
        s = _STATE[state]
        label = (f"<<B>column {k}: {_e(first['task'])}</B><BR/><B>{_badge(first)}</B><BR/>"
                 f"{_small(f'{params:,} params, {_si(macs)} MACs', fade)}>")
        with dot.subgraph(name=f"cluster_c{k}") as c:
            c.attr(label=label, labeljust="c", labelloc=_top(flow), fontname=_FONT,
                   fontsize="11", fontcolor=_FADED["font"] if fade else "black",
                   style="rounded,filled" + (",dashed" if state == "trainable" else ""),
                   fillcolor="#FFFFFF" if fade else s["cluster"],
                   color=_FADED["line"] if fade else s["line"],
                   penwidth="2.4" if state == "sealed" and not fade else "1.2",
                   id=f"cluster_c{k}", **_cls(f"column {mark(fade)}"))
            for n in nodes:
                d = G.nodes[n]
                if d["weighted"]:
                    figures = f"{_si(d['params'])} params, {_si(d['macs'])} MACs"
                    label = f"<<B>{_e(d['label'])}</B><BR/>{_small(figures, fade)}>"
                    size = {"fontsize": "11", "height": "0.45", "width": "1.7"}
                else:
                    label = _e(d["label"])
                    size = {"fontsize": "9", "height": "0.22", "width": "1.1"}
                c.node(n, label=label, id=n, fontname=_FONT, margin="0.06,0.03",
                       tooltip=f"{d['module']}: {d['in_shape']} -> {d['out_shape']}",
                       **_cls(f"layer {mark(fade)}"), **size, **_node_style(state, fade))
            for n in heads_on.get(k, []):
                d = G.nodes[n]
                hs, hf = _state(d), faded(d["part"])
                text = f"{d['classes']} classes, {_si(d['params'])} params"
                c.node(n, id=n, fontname=_FONT, fontsize="11", width="1.7",
                       label=(f"<<B>head {_e(d['task'])}</B><BR/>{_small(text, hf)}<BR/>"
                              f"{_small('<B>' + _STATE[hs]['badge'] + '</B>', hf)}>"),
                       tooltip=f"{d['module']}: {d['in_shape']} -> {d['out_shape']}",
                       **_cls(f"head {mark(hf)}"), **_node_style(hs, hf))
    kinds: list[str] = []
    removed = False
    top = max([d["usage"] for _u, _v, d in G.edges(data=True)
               if d.get("role") == "lateral" and d.get("usage") is not None] or [0.0])
    for u, v, d in G.edges(data=True):
        eid = _edge_id(u, v, d)
        if d["role"] == "forward":
            fade = faded(G.nodes[u].get("part")) or faded(G.nodes[v].get("part"))
            dot.edge(u, v, id=eid, **_cls(f"forward {mark(fade)}"),
                     color=_FADED["edge"] if fade else _FORWARD, penwidth="1.2",
                     arrowsize="0.7", weight="8")
            continue
        live = d["state"] == "live"
        if not live and not show_removed:
            continue
        removed |= not live
        if live and d["kind"] not in kinds:
            kinds.append(d["kind"])
        fade = faded(d["part"])
        attrs = _lateral_style(d["kind"], _state(d), live, fade, _usage_width(d["usage"], top))
        tip = f"{d['key']} ({d['kind']}, {d['state']}): {d['params']:,} params, {d['macs']:,} MACs"
        if d["usage"] is not None:
            tip += f", usage {d['usage']:.3g}"
        if not live:
            attrs.update(xlabel=d["state"], fontsize="8", fontname=_FONT)
        dot.edge(u, v, id=eid, tooltip=tip, arrowsize="0.8",
                 **_cls(f"lateral {d['state']} {mark(fade)}"), **attrs)
    _legend(dot, kinds, removed, top > 0, flow, stacked=True)


# ----------------------------------------------------------------------------- compact view
_PORTS = {"BT": ("n", "s"), "TB": ("s", "n"), "LR": ("e", "w"), "RL": ("w", "e")}


def _compact(dot: Any, G: nx.DiGraph, focus: set[str] | None, show_removed: bool,
             flow: str) -> None:
    """Columns on a diagonal, bundles as labelled boxes on a crossbar between them.

    Column j's output runs along its line past one box per later column k; each box
    bundles the adapters from j into k (blocks and heads) and feeds k along k's row.
    Edges of the crossbar are plain graphviz edges, so dot lays it out as a grid.
    """
    C = column_graph(G)
    out_port, in_port = _PORTS[flow]

    def faded(part: str | None) -> bool:
        return focus is not None and part is not None and part not in focus

    def mark(fade: bool) -> str:
        return "faded" if fade else "focus"

    cols = sorted((d["column"], n) for n, d in C.nodes(data=True) if d["kind"] == "column")
    for _k, n in cols:
        d = C.nodes[n]
        state, fade = _state(d), faded(d["part"])
        lines = [f"<B>column {d['column']}: {_e(d['task'])}</B>", f"<B>{_badge(d)}</B>",
                 _small(f"{d['params']:,} params, {_si(d['macs'])} MACs", fade)]
        for h in d["heads"]:
            hf = fade or faded(h["part"])
            lines.append(_small(f"head {_e(h['task'])}: {h['classes']} classes, "
                                f"{_STATE[_state(h)]['badge'].lower()}", hf))
        dot.node(n, id=n, label="<" + "<BR/>".join(lines) + ">", fontname=_FONT,
                 fontsize="11", margin="0.12,0.06", **_cls(f"column {mark(fade)}"),
                 **_node_style(state, fade))
    # The bundles that are drawn, by (source, target) column.
    top = max([d["usage"] for _u, _v, d in C.edges(data=True)
               if d.get("usage") is not None] or [0.0])
    cells: dict[tuple[int, int], dict[str, Any]] = {}
    for u, v, d in C.edges(data=True):
        if d["role"] == "lateral" and (d["count"] > 0 or (show_removed and d["removed"])):
            cells[C.nodes[u]["column"], C.nodes[v]["column"]] = d
    focused = {pair for pair, d in cells.items()
               if focus is None or set(d["parts"]) & focus}
    kinds: list[str] = []
    for (j, k), d in sorted(cells.items()):
        live = d["count"] > 0
        fade = (j, k) not in focused
        for kind in d["kinds"]:
            if kind not in kinds:
                kinds.append(kind)
        state = "sealed" if d["sealed"] else ("frozen" if d["frozen"] else "trainable")
        color = (_KIND.get(d["kinds"][0], _OTHER_KIND)[0] if len(d["kinds"]) == 1
                 else _OTHER_KIND[0])
        what = d["kinds"][0] if len(d["kinds"]) == 1 else "adapters"
        text = [f"{d['count']} {what}", f"{_si(d['params'])} params"] if live else []
        if d["usage"] is not None:
            text.append(f"usage {d['usage']:.2g}")
        if show_removed and d["removed"]:
            text.append(f"{d['removed']} removed")
        style = _node_style(state, fade)
        style.update(fillcolor="#FFFFFF", color=_FADED["line"] if fade else color,
                     penwidth=_usage_width(d["usage"], top, 0.8, 2.6, 1.0) if live else "1.0")
        if not live:
            style.update(style="dotted", color=_REMOVED, fontcolor=_REMOVED)
        name = f"b{j}_{k}"
        dot.node(name, id=f"bundle:c{j}:c{k}", label="\n".join(text), fontname=_FONT,
                 fontsize="7", height="0.3", width="0.8", margin="0.04,0.02",
                 tooltip=f"from column {j} into column {k}: {', '.join(d['keys']) or 'none live'}",
                 **_cls(f"bundle {mark(fade)}"), **style)
    # Rows: the bundles into column k, left to right by source, then column k itself.
    by_row: dict[int, list[int]] = {}
    for j, k in cells:
        by_row.setdefault(k, []).append(j)
    for k, n in cols:
        sources = sorted(by_row.get(k, []))
        # Each column reads the input: a small input stub closes its row.
        stub = f"input_c{k}"
        col_fade = faded(C.nodes[n]["part"])
        dot.node(stub, id=stub, label="input", shape="oval", fontname=_FONT, fontsize="8",
                 height="0.25", width="0.5", margin="0.02,0.01", style="filled",
                 fillcolor="#FFFFFF", color=_FADED["line"] if col_fade else "#404040",
                 fontcolor=_FADED["font"] if col_fade else "black",
                 **_cls(f"input {mark(col_fade)}"))
        row = [f"b{j}_{k}" for j in sources] + [n, stub]
        with dot.subgraph() as r:
            r.attr(rank="same")
            for name in row:
                r.node(name)
        for i, (a, b) in enumerate(zip(row, row[1:], strict=False)):
            if b == stub:  # drawn from the column to the stub, with the arrow at the column
                dot.edge(a, b, dir="back", id=f"forward:{INPUT}:{n}", penwidth="1.0",
                         color=_FADED["edge"] if col_fade else _FORWARD, arrowsize="0.6",
                         **_cls(f"forward {mark(col_fade)}"))
                continue
            d = cells[sources[i], k]
            live = d["count"] > 0
            fade = not any((j, k) in focused for j in sources[:i + 1])
            state = "sealed" if d["sealed"] else ("frozen" if d["frozen"] else "trainable")
            attrs = _lateral_style(d["kinds"] or ["removed"], state, live, fade,
                                   _usage_width(d["usage"], top, 0.6, 3.2))
            attrs.pop("constraint")
            if b != n:
                attrs["arrowhead"] = "none"
            dot.edge(a, b, id=f"row:{a}:{b}", **_cls(f"bundle-row {mark(fade)}"),
                     arrowsize="0.7", **attrs)
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
                     color=_FADED["edge"] if fade else "#606060",
                     **_cls(f"bundle-line {mark(fade)}"))
    _legend(dot, kinds, show_removed and any(d["removed"] for d in cells.values()), top > 0,
            flow, stacked=False)


# ----------------------------------------------------------------------------- public
def to_dot(net: ProgressiveNet, task: str | None = None, compact: bool = False,
           direction: str = "BT", show_removed: bool = False, dpi: int | None = None,
           G: nx.DiGraph | None = None) -> Any:
    """A ``graphviz.Digraph`` of the network; ``task`` highlights its closure."""
    import graphviz

    if direction not in DIRECTIONS:
        raise UsageError(f"unknown direction {direction!r}; use one of "
                         f"{', '.join(DIRECTIONS)}")
    focus = closure_parts(net, task) if task is not None else None
    G = build_graph(net) if G is None else G
    dot = graphviz.Digraph(name="colonnade")
    dot.attr(rankdir=direction, label=_title(G, net, task, compact), labelloc="t",
             fontname=_FONT, fontsize="13", nodesep="0.3" if not compact else "0.15",
             ranksep="0.28" if not compact else "0.25", newrank="true", bgcolor="white")
    if dpi is not None:
        dot.attr(dpi=str(dpi))
    dot.attr("edge", fontname=_FONT)
    (_compact if compact else _full)(dot, G, focus, show_removed, direction)
    return dot


def _format_of(output: Path) -> str:
    suffix = output.suffix.lower().lstrip(".")
    if suffix == "gv":
        suffix = "dot"
    if suffix not in FORMATS:
        raise UsageError(f"{output}: unknown diagram format {output.suffix or '(none)'!r}; "
                         f"name the file .svg, .png, .pdf or .dot")
    return suffix


def render(net: ProgressiveNet, output: str | Path, task: str | None = None,
           compact: bool = False, direction: str = "BT", show_removed: bool = False,
           ) -> dict[str, Any]:
    """Write the diagram to ``output`` (format from its suffix), atomically.

    Without graphviz's ``dot`` program, the DOT source is written beside ``output`` (same
    name, ``.dot``) and GraphvizMissingError says how to install graphviz.
    """
    import graphviz

    output = Path(output)
    if output.is_dir():
        raise UsageError(f"{output}: is a folder; give a file name such as "
                         f"{output / 'architecture.svg'}")
    fmt = _format_of(output)
    if not output.parent.is_dir():
        raise UsageError(f"{output.parent}: no such folder for the diagram; create it first")
    if task is not None:
        net.task(task)
    dot = to_dot(net, task=task, compact=compact, direction=direction,
                 show_removed=show_removed, dpi=144 if fmt == "png" else None)
    result = {"output": str(output), "format": fmt, "compact": compact, "task": task}
    if fmt == "dot":
        atomic_write(output, dot.source)
        return result
    try:
        data = dot.pipe(format=fmt, engine="dot", quiet=True)
    except graphviz.ExecutableNotFound:
        beside = output.with_suffix(".dot")
        atomic_write(beside, dot.source)
        raise GraphvizMissingError(
            f"graphviz's dot program was not found, so only the DOT source was written to "
            f"{beside}; {INSTALL_HINT} to get {output.name}") from None
    except graphviz.CalledProcessError as exc:
        detail = (exc.stderr or b"").decode("utf-8", "replace").strip().splitlines()
        raise ColonnadeError(f"graphviz's dot failed on the diagram "
                             f"({detail[0] if detail else exc}); please report this") from None
    atomic_write(output, data)
    return result


def draw_workspace(folder: str | Path, output: str | Path, task: str | None = None,
                   compact: bool = False, direction: str = "BT", show_removed: bool = False,
                   ) -> dict[str, Any]:
    """``colonnade draw``: load a workspace and render its diagram."""
    net = load(folder)
    return render(net, output, task=task, compact=compact, direction=direction,
                  show_removed=show_removed)
