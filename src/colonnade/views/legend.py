"""The diagram's legend: one small table that lists only what the drawing shows.

A legend that names states the picture does not contain (TRAINABLE when nothing trains)
sends the reader looking for them, so the drawing code records what it draws in a
``Shown`` and the legend is built from that alone. It is one graphviz node with an
HTML-like label (a table of samples), so it costs one box and can be put in a corner;
line samples are box-drawing characters in the line's colour, state samples small boxes
in the state's fill and border (``draw_style.STATE_STYLE``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .draw_style import (
    ARROW_GLYPH,
    FONT,
    FORWARD_COLOUR,
    KIND_STYLE,
    OTHER_KIND_STYLE,
    REMOVED_COLOUR,
    STATE_STYLE,
    css_class,
    esc,
)

__all__ = ["Shown", "legend_label", "legend_node", "LEGEND"]

LEGEND = "legend"
_MEANING = {"trainable": "being trained", "frozen": "never trained again",
            "sealed": "in a sealed closure"}
_SOLID, _DASHED, _DOUBLE, _DOTTED = "\u2501", "\u254d", "\u2550", "\u2508"


@dataclass
class Shown:
    """What a drawing contains, collected while it is drawn."""

    states: set[str] = field(default_factory=set)  # node states: trainable, frozen, sealed
    kinds: list[str] = field(default_factory=list)  # adapter kinds of live laterals drawn
    adapter_states: set[str] = field(default_factory=set)  # states of live laterals drawn
    forward: bool = False
    removed: bool = False
    usage: bool = False
    bundles: bool = False  # compact view: boxes that bundle adapters

    def lateral(self, kind: str, state: str) -> None:
        if kind not in self.kinds:
            self.kinds.append(kind)
        self.adapter_states.add(state)


def _state_cell(state: str) -> str:
    s = STATE_STYLE[state]
    style = ' STYLE="rounded,dashed"' if state == "trainable" else ""
    inner = (f'<TABLE BORDER="1" CELLBORDER="0" CELLPADDING="1" CELLSPACING="0"{style} '
             f'BGCOLOR="{s["fill"]}" COLOR="{s["line"]}"><TR><TD><FONT POINT-SIZE="8">'
             f'{s["badge"]}</FONT></TD></TR></TABLE>')
    if s["peripheries"] == "2":  # a double border, as the sealed boxes have
        inner = (f'<TABLE BORDER="1" CELLBORDER="0" CELLPADDING="0" CELLSPACING="1" '
                 f'COLOR="{s["line"]}"><TR><TD>{inner}</TD></TR></TABLE>')
    return inner


def _line(colour: str, glyph: str, stroke: str = _SOLID, size: int = 0) -> str:
    font = f' POINT-SIZE="{size}"' if size else ""
    return f'<FONT COLOR="{colour}"{font}>{stroke * 4}{glyph}</FONT>'


def legend_label(shown: Shown) -> str:
    """The HTML-like label of the legend node; rows only for what ``shown`` holds."""
    rows: list[tuple[str, str]] = [(_state_cell(s), _MEANING[s]) for s in STATE_STYLE
                                   if s in shown.states]
    arrow = ARROW_GLYPH["normal"]
    if shown.forward:
        rows.append((_line(FORWARD_COLOUR, arrow), "forward (input to head)"))
    for kind in shown.kinds:
        colour, head = KIND_STYLE.get(kind, OTHER_KIND_STYLE)
        rows.append((_line(colour, ARROW_GLYPH[head]), f"{kind} adapter"))
    if "trainable" in shown.adapter_states:
        rows.append((_line("#000000", arrow, _DASHED), "trainable adapter (dashed)"))
    if "sealed" in shown.adapter_states:
        rows.append((_line("#000000", arrow, _DOUBLE), "sealed adapter (double line)"))
    if shown.removed:
        rows.append((_line(REMOVED_COLOUR, "", _DOTTED), "pruned or merged (dotted)"))
    if shown.usage:
        rows.append((_line("#000000", arrow, _SOLID, 15), "wider: higher measured usage"))
    if shown.bundles and shown.kinds:
        colour = KIND_STYLE.get(shown.kinds[0], OTHER_KIND_STYLE)[0]
        rows.append((f'<TABLE BORDER="1" CELLBORDER="0" CELLPADDING="1" COLOR="{colour}">'
                     f'<TR><TD><FONT POINT-SIZE="7">2 {esc(shown.kinds[0])}</FONT></TD></TR>'
                     f'</TABLE>', "a bundle: adapters from one column into another"))
    body = "".join(f'<TR><TD ALIGN="CENTER">{sample}</TD><TD ALIGN="LEFT">{esc(text)}</TD>'
                   f'</TR>' for sample, text in rows)
    return ('<<TABLE BORDER="1" CELLBORDER="0" CELLSPACING="1" CELLPADDING="2" '
            'STYLE="rounded" COLOR="#808080" BGCOLOR="white">'
            '<TR><TD COLSPAN="2" ALIGN="LEFT"><B>legend</B></TD></TR>' + body + "</TABLE>>")


def legend_node(dot: Any, shown: Shown, beside: str | None = None) -> None:
    """The legend as one node: on ``beside``'s rank, to its right, when given; else on its
    own, where dot packs it beside the drawing's first rank (a bottom corner for BT)."""
    dot.node(LEGEND, id=LEGEND, label=legend_label(shown), shape="plaintext", fontname=FONT,
             fontsize="9", margin="0", **css_class("legend"))
    if beside is not None:
        with dot.subgraph() as row:
            row.attr(rank="same")
            row.node(beside)
            row.node(LEGEND)
        dot.edge(beside, LEGEND, style="invis", id="legend_place", minlen="2")
