"""The visual language of the diagrams: palette, node and edge styles, title and legend.

Colours from the Okabe & Ito 2008 palette; every state is also carried by shape, border
and a text badge, so the drawing reads in greyscale and for colour-blind readers (see
``draw.py`` for the whole language). These functions only style; ``draw.py`` lays out.
"""

from __future__ import annotations

import html
from typing import Any

import networkx as nx

from ..model.network import ProgressiveNet
from .graph import INPUT

__all__ = ["STATE_STYLE", "KIND_STYLE", "OTHER_KIND_STYLE", "ARROW_GLYPH", "FORWARD_COLOUR",
           "FADED", "REMOVED_COLOUR", "FONT", "top_of", "css_class", "state_of", "si", "esc",
           "small", "node_style", "usage_width", "lateral_style", "title_of", "name_list",
           "edge_id", "input_node", "badge_text"]

STATE_STYLE = {
    "trainable": {"fill": "#FCE3C2", "line": "#A35200", "shape": "box",
                  "style": "rounded,dashed,filled", "peripheries": "1", "penwidth": "1.6",
                  "badge": "TRAINABLE", "cluster": "#FFF6EB"},
    "frozen": {"fill": "#DCEBF7", "line": "#2F5F8A", "shape": "box", "style": "filled",
               "peripheries": "1", "penwidth": "1.0", "badge": "FROZEN", "cluster": "#F3F8FC"},
    "sealed": {"fill": "#A9C7E3", "line": "#16324D", "shape": "box", "style": "filled",
               "peripheries": "2", "penwidth": "1.0", "badge": "SEALED", "cluster": "#E3EDF6"},
}
KIND_STYLE = {"linear": ("#0072B2", "onormal"), "nonlinear": ("#D55E00", "diamond")}
OTHER_KIND_STYLE = ("#CC79A7", "dot")
ARROW_GLYPH = {"onormal": "\u25b7", "diamond": "\u25c6", "dot": "\u25cf", "normal": "\u25b6"}
FORWARD_COLOUR = "#404040"
FADED = {"fill": "#F7F7F7", "line": "#C4C4C4", "font": "#A6A6A6", "edge": "#D4D4D4"}
REMOVED_COLOUR = "#B8B8B8"
FONT = "Helvetica"


def top_of(flow: str) -> str:
    """Cluster ``labelloc`` that puts a label at the top of the page: dot flips it for BT."""
    return "b" if flow == "BT" else "t"


def css_class(names: str) -> dict[str, str]:
    """The SVG ``class`` of an element (a Python keyword, so passed through a dict)."""
    return {"class": names}


def state_of(d: dict[str, Any]) -> str:
    if d.get("sealed"):
        return "sealed"
    return "frozen" if d.get("frozen", True) else "trainable"


def si(n: int | float) -> str:
    """12345 -> '12.3k': figures short enough for a node label."""
    n = float(n)
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.3g}{unit}"
    return f"{n:.0f}"


def esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def small(text: str, faded: bool = False, size: int = 8) -> str:
    color = f' COLOR="{FADED["font"]}"' if faded else ""
    return f'<FONT POINT-SIZE="{size}"{color}>{text}</FONT>'


def node_style(state: str, faded: bool) -> dict[str, str]:
    s = STATE_STYLE[state]
    attrs = {"shape": s["shape"], "style": s["style"], "peripheries": s["peripheries"],
             "penwidth": s["penwidth"], "fillcolor": s["fill"], "color": s["line"],
             "fontcolor": "black"}
    if faded:
        attrs.update(fillcolor=FADED["fill"], color=FADED["line"],
                     fontcolor=FADED["font"])
    return attrs


def usage_width(usage: float | None, top: float, low: float = 0.6, high: float = 4.6,
                 unmeasured: float = 1.4) -> str:
    """Pen width by measured usage, from ``low`` (unused) to ``high`` (the most used)."""
    if usage is None or top <= 0:
        return f"{unmeasured:g}"
    return f"{low + (high - low) * max(usage, 0.0) / top:.2f}"


def lateral_style(kind: str | list[str], state: str, live: bool, faded: bool,
                   width: str) -> dict[str, str]:
    kinds = kind if isinstance(kind, list) else [kind]
    one = len(kinds) == 1
    color, arrow = KIND_STYLE.get(kinds[0], OTHER_KIND_STYLE) if one else OTHER_KIND_STYLE
    if not live:
        return {"color": REMOVED_COLOUR, "fontcolor": REMOVED_COLOUR, "style": "dotted",
                "arrowhead": arrow, "penwidth": "1.0", "constraint": "false"}
    if faded:
        color = FADED["edge"]
    style = "dashed" if state == "trainable" else "solid"
    line = f"{color}:invis:{color}" if state == "sealed" else color
    return {"color": line, "fontcolor": FADED["font"] if faded else color, "style": style,
            "arrowhead": arrow, "penwidth": width, "constraint": "false"}


# ----------------------------------------------------------------------------- pieces
def title_of(G: nx.DiGraph, net: ProgressiveNet, task: str | None, compact: bool) -> str:
    params = sum(p.numel() for p in net.parameters())
    if net.adopted is not None and net.adopted.model is None:  # a .pt2 or .onnx file
        params += G.nodes["c0_model"]["params"]
    macs = sum(d.get("macs", 0) for _n, d in G.nodes(data=True))
    macs += sum(d.get("macs", 0) for _u, _v, d in G.edges(data=True))
    n = len(net.tasks)
    line = (f"<B>{esc(net.spec.name)}</B>: input {list(net.input_shape)}, "
            f"{n} task{'s' * (n != 1)}, {len(net.columns)} "
            f"column{'s' * (len(net.columns) != 1)}, {params:,} parameters, "
            f"{si(macs)} MACs per sample (all tasks)")
    sealed = G.graph.get("sealed") or []
    if sealed:
        line += f"<BR/>sealed: {esc(name_list(sealed, 8))}"
    if task is not None:
        c = net.closure(task)
        cols = [str(k) if not c.is_partial(k) else
                (f"{k} (block 0 only)" if c.depth(k) == 1 else
                 f"{k} (blocks 0-{c.depth(k) - 1} only)") for k in c.columns]
        cols_text = cols[0] if len(cols) == 1 else ", ".join(cols[:-1]) + " and " + cols[-1]
        line += (f"<BR/>focus: task {esc(task)} runs column{'s' * (len(cols) != 1)} "
                 f"{cols_text} with {len(c.adapters)} lateral "
                 f"adapter{'s' * (len(c.adapters) != 1)} and its head; the rest is faded")
    if compact:
        line += "<BR/>" + small(
            "one box per column; a small box where column j's line meets column k's row "
            "bundles the lateral adapters from column j into column k", size=10)
    return f"<{line}>"


def name_list(names: list[str], most: int) -> str:
    shown = ", ".join(names[:most])
    return shown + (f" and {len(names) - most} more" if len(names) > most else "")


def edge_id(u: str, v: str, d: dict[str, Any]) -> str:
    return f"lateral:{d['key']}" if d.get("role") == "lateral" else f"forward:{u}:{v}"


def input_node(dot: Any, shape: list[int], faded: bool = False) -> None:
    dot.node(INPUT, id=INPUT, **css_class("input " + ("faded" if faded else "focus")),
             label=f"<<B>input</B><BR/>{small(esc(shape))}>", shape="oval", style="filled",
             fillcolor="#FFFFFF", color=FADED["line"] if faded else "#404040",
             fontcolor=FADED["font"] if faded else "black", fontname=FONT, fontsize="11")


def badge_text(d: dict[str, Any]) -> str:
    """The text badge; a sealed part also names its seal, or counts several."""
    state = state_of(d)
    badge = STATE_STYLE[state]["badge"]
    by = d.get("sealed_by") or []
    if state == "sealed" and by:
        badge += f" by {esc(' and '.join(by))}" if len(by) <= 2 else f" by {len(by)} tasks"
    return badge


# ----------------------------------------------------------------------------- full view
