"""The report's page: one self-contained HTML file, styles inline, figures inline SVG, nothing fetched.

It has to open on an air-gapped plant laptop in any browser and print legibly in grey, so there are
no scripts, web fonts, external images or links out; colours carry no meaning alone (every verdict
has a word and a symbol). The look is streamguard's own: a warm paper ground, a narrow column of
contents on wide screens, numbered sections with a rule on the left, and tabular figures in a
monospaced face so columns of numbers line up.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

CSS = """
:root { --ink:#23233a; --paper:#fdfcf8; --rule:#8d8a80; --guide:#e4e0d5; --accent:#173f6b; --warm:#b04a1c;
        --amber:#d6a019; --soft:#f4f1e8; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.5 "Segoe UI", "DejaVu Sans", "Liberation Sans", system-ui, sans-serif; }
.page { display:grid; grid-template-columns: 13rem minmax(0, 1fr); gap: 2.2rem; max-width: 76rem;
        margin: 0 auto; padding: 1.6rem 1.4rem 4rem; }
nav { position:sticky; top:1rem; align-self:start; font-size:0.86rem; border-right:1px solid var(--guide);
      padding-right:1rem; }
nav ol { list-style:none; padding:0; margin:0.4rem 0 0; counter-reset: part; }
nav li { counter-increment: part; margin:0.25rem 0; }
nav li::before { content: counter(part) "  "; color:var(--rule); font-variant-numeric: tabular-nums; }
nav a { color:var(--ink); text-decoration:none; border-bottom:1px dotted var(--rule); }
header.report { border-bottom: 3px double var(--ink); padding-bottom:0.6rem; margin-bottom:1.2rem; }
header.report h1 { font-size:1.55rem; margin:0 0 0.2rem; letter-spacing:0.01em; }
header.report p { margin:0.1rem 0; color:#4a4a5e; }
main { counter-reset: section; min-width:0; }
section { counter-increment: section; margin: 2.1rem 0 0; padding-left: 1rem; border-left: 4px solid var(--accent); }
section > h2 { font-size:1.18rem; margin:0 0 0.5rem; }
section > h2::before { content: counter(section) " \\2014  "; color:var(--rule); font-weight:normal; }
h3 { font-size:1rem; margin:1.4rem 0 0.4rem; }
p.note, .note { color:#4a4a5e; font-size:0.88rem; }
.facts { display:grid; grid-template-columns: repeat(auto-fill, minmax(11rem, 1fr)); gap:0.5rem 1rem;
         margin:0.6rem 0 1rem; }
.fact { background:var(--soft); padding:0.45rem 0.7rem; border-top:2px solid var(--ink); }
.fact b { display:block; font-size:1.22rem; font-variant-numeric: tabular-nums; }
.fact span { font-size:0.8rem; color:#4a4a5e; }
table { border-collapse:collapse; margin:0.5rem 0 1rem; font-size:0.86rem; }
th, td { padding:0.22rem 0.7rem 0.22rem 0; text-align:left; vertical-align:top; border-bottom:1px solid var(--guide); }
th { border-bottom:1.5px solid var(--ink); font-weight:600; }
td.num, th.num { text-align:right; font-size:0.82rem;
                 font-family:"DejaVu Sans Mono", "Liberation Mono", Consolas, monospace; }
td.num { white-space:nowrap; }
.wide { overflow-x:auto; }
.verdict { white-space:nowrap; font-weight:600; }
.verdict.meets::before { content:"\\25CF  "; color:var(--accent); }
.verdict.manageable::before { content:"\\25D0  "; color:var(--amber); }
.verdict.above::before { content:"\\25B2  "; color:var(--warm); }
.flag { font-weight:600; }
.missed { color:#77778a; font-style:italic; }
td:first-child { white-space:nowrap; }
dt { font-weight:600; margin-top:0.4rem; } dd { margin-left:1.2rem; font-size:0.88rem; }
.flag::before { content:"\\25C6  "; color:var(--warm); }
figure { margin: 0.7rem 0 1.2rem; }
figure svg { width:100%; height:auto; display:block; }
figcaption { font-size:0.82rem; color:#4a4a5e; margin-top:0.2rem; }
.source { font-size:0.78rem; color:#5a5a6e; }
footer { margin-top:3rem; font-size:0.8rem; color:#5a5a6e; border-top:1px solid var(--guide); padding-top:0.5rem; }
@media (max-width: 60rem) { .page { grid-template-columns: 1fr; } nav { position:static; border:0; } }
@media print { body { background:white; font-size:11pt; } nav { display:none; } .page { display:block; }
               section { break-inside:auto; } figure { break-inside:avoid; } }
"""


def esc(text: object) -> str:
    return html.escape(str(text), quote=True)


@dataclass
class Section:
    anchor: str
    title: str
    parts: list[str] = field(default_factory=list)

    def add(self, *html_parts: str) -> Section:
        self.parts.extend(html_parts)
        return self

    def render(self) -> str:
        return f'<section id="{esc(self.anchor)}"><h2>{esc(self.title)}</h2>\n' + "\n".join(self.parts) + "</section>"


def paragraph(text: str, css: str = "") -> str:
    attribute = f' class="{css}"' if css else ""
    return f"<p{attribute}>{esc(text)}</p>"


def facts(items: Iterable[tuple[str, str]]) -> str:
    cells = "".join(f'<div class="fact"><b>{esc(value)}</b><span>{esc(label)}</span></div>' for value, label in items)
    return f'<div class="facts">{cells}</div>'


@dataclass(frozen=True)
class Cell:
    """A table cell: text, whether it is a number (right-aligned, monospaced) and an optional class."""

    text: str
    numeric: bool = False
    css: str = ""


def cell(value: object, css: str = "") -> Cell:
    if isinstance(value, Cell):
        return value
    if value is None:
        return Cell("-", True, css)
    if isinstance(value, bool):
        return Cell("yes" if value else "no", False, css)
    if isinstance(value, int):
        return Cell(f"{value:,}", True, css)
    if isinstance(value, float):
        text = f"{value:,.0f}" if value == int(value) and abs(value) < 1e15 else f"{value:,.3g}"
        return Cell(text, True, css)
    return Cell(str(value), False, css)


def table(header: Sequence[str], rows: Iterable[Sequence[object]], numeric_header: Sequence[bool] | None = None) -> str:
    body = []
    first_numeric: list[bool] | None = None
    for row in rows:
        cells = [cell(v) for v in row]
        if first_numeric is None:
            first_numeric = [c.numeric for c in cells]
        tds = "".join(
            f'<td class="{" ".join(x for x in ("num" if c.numeric else "", c.css) if x)}">{esc(c.text)}</td>'
            if (c.numeric or c.css) else f"<td>{esc(c.text)}</td>"
            for c in cells
        )  # fmt: skip
        body.append(f"<tr>{tds}</tr>")
    numeric = list(numeric_header) if numeric_header is not None else (first_numeric or [False] * len(header))
    ths = "".join(f'<th class="num">{esc(h)}</th>' if n else f"<th>{esc(h)}</th>"
                  for h, n in zip(header, [*numeric, *([False] * len(header))], strict=False))  # fmt: skip
    return f'<div class="wide"><table><thead><tr>{ths}</tr></thead><tbody>{"".join(body)}</tbody></table></div>'


def figure(svg: str, caption: str) -> str:
    return f"<figure>{svg}<figcaption>{esc(caption)}</figcaption></figure>"


def page(title: str, subtitle_lines: Sequence[str], sections: Sequence[Section], footer: str) -> str:
    contents = "".join(f'<li><a href="#{esc(s.anchor)}">{esc(s.title)}</a></li>' for s in sections)
    subtitle = "".join(f"<p>{esc(line)}</p>" for line in subtitle_lines)
    body = "\n".join(s.render() for s in sections)
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(title)}</title><style>{CSS}</style></head>\n"
        f'<body><div class="page"><nav><strong>Contents</strong><ol>{contents}</ol></nav>\n'
        f'<main><header class="report"><h1>{esc(title)}</h1>{subtitle}</header>\n{body}\n'
        f"<footer>{esc(footer)}</footer></main></div></body></html>\n"
    )
