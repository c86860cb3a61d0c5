"""The report as a small document model, rendered to Markdown and to HTML for screen and print.

The report's builders produce ``Section`` objects made of paragraphs, tables and figures;
this module alone knows how each looks in ``report.md`` and in ``report.html``, so the
PDF (printed from that HTML) and the Markdown can never say different things.

Print layout (the CSS paged-media rules that WeasyPrint follows): A4 landscape, so that
the widest table (13 cost columns) fits at a readable size; table cells wrap instead of
running off the page; header rows repeat on every page a table spans; every page carries the
workspace name, the generation time and "page N of M" in its footer.
"""

from __future__ import annotations

import base64
import html
import re
from dataclasses import dataclass, field

__all__ = ["Table", "Figure", "Section", "to_markdown", "to_html", "WIDE_COLUMNS"]

WIDE_COLUMNS = 8  # a table with more columns than this gets a landscape page in print


@dataclass
class Table:
    """A header row and body rows of text; ``key_value``: a two-column fact sheet."""

    rows: list[list[str]]
    caption: str = ""
    key_value: bool = False

    @property
    def wide(self) -> bool:
        return bool(self.rows) and len(self.rows[0]) > WIDE_COLUMNS


@dataclass
class Figure:
    """An image the report ships as a file (``name``) and inlines in the HTML."""

    name: str
    alt: str
    small: bool = False  # drawn beside a table rather than across the page
    large: bool = False  # a diagram or a big matrix: may take most of a page


@dataclass
class Section:
    title: str
    paragraphs: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    figures: list[Figure] = field(default_factory=list)
    level: int = 2
    anchor: str = ""
    emphasis: list[str] = field(default_factory=list)  # paragraphs set apart (a caution)
    after: list[str] = field(default_factory=list)  # paragraphs after the tables
    new_page: bool = False  # in print, start on a fresh page

    @property
    def wide(self) -> bool:
        return any(t.wide for t in self.tables)


# ----------------------------------------------------------------------------- markdown
def _md_cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _md_table(t: Table) -> list[str]:
    out = []
    if t.caption:
        out += [f"*{t.caption}*", ""]
    out.append("| " + " | ".join(_md_cell(c) for c in t.rows[0]) + " |")
    out.append("|" + "---|" * len(t.rows[0]))
    out += ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in t.rows[1:]]
    return out + [""]


def to_markdown(title: str, sections: list[Section], figures: dict[str, bytes],
                notes: list[str]) -> str:
    lines = [f"# {title}", ""]
    for s in sections:
        lines += ["#" * s.level + f" {s.title}", ""]
        for p in s.emphasis:
            lines += [f"> {p}", ""]
        for p in s.paragraphs:
            lines += [p, ""]
        for t in s.tables:
            if t.rows:
                lines += _md_table(t)
        for f in s.figures:
            if f.name in figures:
                lines += [f"![{f.alt}]({f.name})", ""]
        for p in s.after:
            lines += [p, ""]
    for n in notes:
        lines += [f"*{n}*", ""]
    return "\n".join(lines)


# ----------------------------------------------------------------------------- html
_CSS = """
body{font-family:'DejaVu Sans',system-ui,sans-serif;max-width:1200px;margin:2em auto;
padding:0 1em;color:#222;line-height:1.4;font-size:15px}
h1{font-size:1.55em;border-bottom:2px solid #0072B2;padding-bottom:.2em;margin-bottom:.3em}
h2{font-size:1.2em;margin-top:1.6em;color:#0072B2}
h3{font-size:1.05em;margin-top:1.2em;color:#16324D}
.byline{color:#555;margin-top:0}
.caution{border-left:4px solid #D55E00;background:#FDF1E8;padding:.4em .8em;margin:.8em 0}
table{border-collapse:collapse;font-size:.8em;margin:.5em 0;max-width:100%}
caption{caption-side:top;text-align:left;font-style:italic;color:#555;padding:.2em 0}
th,td{border:1px solid #ccc;padding:.2em .45em;text-align:right;vertical-align:top}
th{background:#f0f4f9;font-weight:600}
td{white-space:nowrap}
td:first-child,th:first-child,.text{text-align:left}
table.kv td{white-space:normal;text-align:left;overflow-wrap:anywhere}
table.kv td:first-child{color:#444;white-space:nowrap}
table.kv th{text-align:left}
td.wrap{white-space:normal;text-align:left;min-width:10em}
.pair{display:flex;gap:1.5em;align-items:flex-start;flex-wrap:wrap}
.pair > div{flex:0 1 auto}
img{max-width:100%;height:auto;margin:.4em 0}
img.small{max-width:320px}
.verdict-exact{color:#006d4b;font-weight:600}
.verdict-moved,.verdict-unverified{color:#b3261e;font-weight:600}
.note{color:#666;font-style:italic}
.footer-name{string-set:wsname content()}
.footer-time{string-set:gentime content()}
@media print{
 @page{size:A4 landscape;margin:1.3cm 1.4cm 1.5cm 1.4cm;
  @bottom-left{content:string(wsname);font:8pt 'DejaVu Sans',sans-serif;color:#555}
  @bottom-center{content:string(gentime);font:8pt 'DejaVu Sans',sans-serif;color:#555}
  @bottom-right{content:"page " counter(page) " of " counter(pages);
   font:8pt 'DejaVu Sans',sans-serif;color:#555}}
 body{max-width:none;margin:0;padding:0;font-size:9.5pt}
 table{font-size:7.5pt;page-break-inside:auto}
 thead{display:table-header-group}
 tr{page-break-inside:avoid}
 th{white-space:normal}
 td{white-space:normal;overflow-wrap:normal}
 h2,h3{page-break-after:avoid}
 .pair{display:block}
 .pair > div{display:inline-block;vertical-align:top;margin-right:1.2em}
 img{max-width:100%;max-height:10.5cm}
 img.small{width:6.5cm;max-height:none}
 img.large{max-height:15.5cm}
 section.keep{page-break-inside:avoid}
 section.new-page{page-break-before:always}
 .hidden-print{display:none}
}
"""


def _img(name: str, data: bytes, alt: str, css: str = "") -> str:
    mime = "image/svg+xml" if name.endswith(".svg") else "image/png"
    cls = f' class="{css}"' if css else ""
    return (f'<img{cls} alt="{html.escape(alt)}" '
            f'src="data:{mime};base64,{base64.b64encode(data).decode("ascii")}">')


def _verdict_class(text: str) -> list[str]:
    word = text.split(" ")[0] if text else ""
    return [f"verdict-{word}"] if word in ("exact", "moved", "unverified") else []


_FIGURE = re.compile(r"^[-+]?[\d,.]+( ?(%|B|KiB|MiB|GiB|ms))?( \([\d.,-]+\))?$|^-$|^v\d+$")


def _text_columns(t: Table) -> set[int]:
    """Columns holding words rather than figures: those are read left-aligned."""
    return {i for i in range(len(t.rows[0]))
            if any(i < len(r) and not _FIGURE.match(r[i]) for r in t.rows[1:])}


def _html_table(t: Table) -> str:
    e = html.escape
    cls = ' class="kv"' if t.key_value else ""
    text = _text_columns(t)

    def cell(i: int, c: str) -> str:
        classes = (["text"] if i in text else []) + _verdict_class(c)
        return f'<td class="{" ".join(classes)}">' if classes else "<td>"

    out = [f"<table{cls}>"]
    if t.caption:
        out.append(f"<caption>{e(t.caption)}</caption>")
    left = ' class="text"'
    out.append("<thead><tr>" + "".join(f"<th{left if i in text else ''}>{e(c)}</th>"
                                       for i, c in enumerate(t.rows[0]))
               + "</tr></thead><tbody>")
    for r in t.rows[1:]:
        out.append("<tr>" + "".join(f"{cell(i, c)}{e(c)}</td>" for i, c in enumerate(r))
                   + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def to_html(title: str, sections: list[Section], figures: dict[str, bytes], notes: list[str],
            footer_name: str, footer_time: str) -> str:
    """One self-contained HTML file (images inlined, no script, no external link)."""
    e = html.escape
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{e(title)}</title><style>{_CSS}</style></head><body>",
             f"<h1>{e(title)}</h1>",
             f'<p class="byline"><span class="footer-name">{e(footer_name)}</span> &middot; '
             f'<span class="footer-time">{e(footer_time)}</span></p>']
    for s in sections:
        anchor = f' id="{e(s.anchor)}"' if s.anchor else ""
        keep = " keep" if not s.tables and s.figures else ""  # keep a title with its figure
        page = " new-page" if s.new_page else ""
        parts.append(f'<section{anchor} class="{"wide" if s.wide else "narrow"}{keep}{page}">')
        parts.append(f"<h{s.level}>{e(s.title)}</h{s.level}>")
        parts += [f'<p class="caution">{e(p)}</p>' for p in s.emphasis]
        parts += [f"<p>{e(p)}</p>" for p in s.paragraphs]
        small = [f for f in s.figures if f.small and f.name in figures]
        tables = [_html_table(t) for t in s.tables if t.rows]
        if small and tables:  # a fact table beside its small figure
            parts.append('<div class="pair">' + "".join(f"<div>{t}</div>" for t in tables)
                         + "".join(f"<div>{_img(f.name, figures[f.name], f.alt, 'small')}"
                                   f"</div>" for f in small) + "</div>")
        else:
            parts += tables
            parts += [_img(f.name, figures[f.name], f.alt, "small") for f in small]
        for f in s.figures:
            if not f.small and f.name in figures:
                parts.append(_img(f.name, figures[f.name], f.alt, "large" if f.large else ""))
        parts += [f"<p>{e(p)}</p>" for p in s.after]
        parts.append("</section>")
    parts += [f'<p class="note">{e(n)}</p>' for n in notes]
    parts.append("</body></html>")
    return "\n".join(parts)
