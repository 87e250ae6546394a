"""The report's HTML: one self-contained page (inline CSS, relative links to its PNGs only).

Every piece of text that comes from the session (ids, rule names, messages,
notes, paths) goes through :func:`html.escape`; the only markup is ours.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field
from typing import Sequence

__all__ = ["Table", "FigureRef", "Section", "render_page", "SAFETY_CAUTION"]

SAFETY_CAUTION = ("Proposals are suggestions to the operator, not instructions. Beam-sensitive "
                  "specimens have dose budgets: check the dose of every proposed scan against "
                  "yours before accepting it. Facility procedures and the instrument's own "
                  "interlocks come first.")

_CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 1200px;
       color: #1a1a1a; line-height: 1.4; padding: 0 1em; }
h1 { font-size: 1.5em; } h2 { font-size: 1.25em; border-bottom: 1px solid #bbb;
     padding-bottom: .2em; margin-top: 2em; } h3 { font-size: 1.05em; }
table { border-collapse: collapse; margin: .5em 0 1em; font-size: .85em; }
th, td { border: 1px solid #ccc; padding: .25em .5em; text-align: left; vertical-align: top; }
th { background: #f0f0f0; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 1em 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: .85em; color: #333; max-width: 60em; }
.caution { border-left: 5px solid #D55E00; background: #fff4ec; padding: .6em .9em;
           margin: .8em 0; }
.note { color: #444; font-size: .9em; } .empty { color: #666; font-style: italic; }
nav ul { columns: 2; font-size: .9em; }
"""


@dataclass
class Table:
    """A table: an id (for tests and links), a caption, a header and rows of cells.

    A cell is text or a number; numbers are right-aligned.
    """

    table_id: str
    caption: str
    header: Sequence[str]
    rows: Sequence[Sequence[object]]
    empty_text: str = "nothing recorded"


@dataclass
class FigureRef:
    """A figure of the page: its file relative to the page and its caption."""

    src: str
    caption: str
    alt: str = ""
    vector: str = ""      # the same figure as SVG or PDF, relative to the page


@dataclass
class Section:
    """A heading with paragraphs, cautions, tables and figures, in that order."""

    section_id: str
    title: str
    paragraphs: list[str] = field(default_factory=list)
    cautions: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    figures: list[FigureRef] = field(default_factory=list)
    level: int = 2


def _e(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _cell(value) -> str:
    if isinstance(value, bool) or value is None:
        return f"<td>{_e('' if value is None else value)}</td>"
    if isinstance(value, int):
        return f'<td class="num">{value}</td>'
    if isinstance(value, float):
        return f'<td class="num">{_e(_fmt_float(value))}</td>'
    return f"<td>{_e(value)}</td>"


def _fmt_float(v: float) -> str:
    if v != v:  # NaN
        return ""
    return f"{v:.4g}"


def _table(t: Table) -> str:
    out = [f'<table id="{_e(t.table_id)}">', f"<caption>{_e(t.caption)}</caption>"]
    out.append("<thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in t.header) + "</tr></thead>")
    out.append("<tbody>")
    if not t.rows:
        out.append(f'<tr><td class="empty" colspan="{len(t.header)}">{_e(t.empty_text)}</td>'
                   "</tr>")
    for row in t.rows:
        out.append("<tr>" + "".join(_cell(c) for c in row) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _section(s: Section) -> str:
    h = f"h{s.level}"
    out = [f'<section id="{_e(s.section_id)}">', f"<{h}>{_e(s.title)}</{h}>"]
    out += [f'<p class="caution"><strong>Caution.</strong> {_e(c)}</p>' for c in s.cautions]
    out += [f"<p>{_e(p)}</p>" for p in s.paragraphs]
    out += [_table(t) for t in s.tables]
    for f in s.figures:
        link = ""
        if f.vector:
            kind = f.vector.rsplit(".", 1)[-1].upper()
            link = f' <a class="vector" href="{_e(f.vector)}">{_e(kind)} (vector)</a>'
        out.append(f'<figure><img src="{_e(f.src)}" alt="{_e(f.alt or f.caption)}">'
                   f"<figcaption>{_e(f.caption)}{link}</figcaption></figure>")
    out.append("</section>")
    return "\n".join(out)


def render_page(title: str, intro: Sequence[str], sections: Sequence[Section]) -> str:
    """The whole HTML document."""
    nav = "".join(f'<li><a href="#{_e(s.section_id)}">{_e(s.title)}</a></li>' for s in sections
                  if s.level == 2)
    body = "\n".join(_section(s) for s in sections)
    paras = "\n".join(f'<p class="note">{_e(p)}</p>' for p in intro)
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            f"<h1>{_e(title)}</h1>\n{paras}\n<nav><ul>{nav}</ul></nav>\n{body}\n"
            "</body>\n</html>\n")
