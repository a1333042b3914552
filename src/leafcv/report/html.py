"""HTML of the report: one self-contained page (styles inline, figures as base64 PNG, no script, no
external resource), tables whose every number cell names its CSV column (``data-col``) and whose
table names its CSV file (``data-csv``), so a reader or a test can trace each number.

Tests: tests/report/test_report_page.py, tests/report/test_report_browser.py, tests/report/test_report_decision.py.
"""
from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pandas as pd

from .files import write_text

CSS = """
@page { size: A4; margin: 18mm; }
body { font-family: "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; font-size: 10.5pt; line-height: 1.45;
       color: #111; max-width: 200mm; margin: 0 auto; padding: 0 6mm 24mm; background: #fff; }
h1 { font-size: 17pt; margin: 14pt 0 2pt; } h2 { font-size: 13.5pt; margin: 22pt 0 6pt;
     border-bottom: 1px solid #bbb; padding-bottom: 2pt; } h3 { font-size: 11pt; margin: 14pt 0 4pt; }
p, li { max-width: 175mm; } .sub { color: #444; margin-top: 0; }
.box { border-left: 4px solid #0072B2; background: #f3f7fb; padding: 6pt 10pt; margin: 8pt 0; }
.warn { border-left: 4px solid #D55E00; background: #fdf3ec; padding: 6pt 10pt; margin: 8pt 0; }
.wide { overflow-x: auto; }
table { border-collapse: collapse; font-size: 8pt; margin: 6pt 0 10pt; }
th, td { padding: 1.5pt 3.5pt; border-bottom: 1px solid #ddd; vertical-align: top; text-align: left; }
th { background: #f0f0f0; font-weight: 600; } td.n { text-align: right; font-variant-numeric: tabular-nums;
     white-space: nowrap; }
td[data-col="structure"], td[data-col="role"], td[data-col="first"], td[data-col="second"],
td[data-col="other"], td[data-col="leaf"] { white-space: nowrap; }
caption { caption-side: top; text-align: left; font-size: 8.6pt; color: #444; padding-bottom: 3pt; }
figure { margin: 8pt 0 14pt; } figure img { width: 100%; max-width: 176mm; height: auto; display: block; }
figcaption, .files { font-size: 8.6pt; color: #444; } code { font-size: 9pt; }
pre { white-space: pre-wrap; font-size: 8.6pt; background: #f7f7f7; padding: 6pt; }
nav ol { columns: 2; font-size: 9.5pt; } .methods p { text-align: justify; }
"""

MISSING = "–"


def esc(value: object) -> str:
    return html.escape(str(value), quote=True)


def number(value: object, spec: str) -> str:
    """``value`` formatted by ``spec``; NaN, None and NA as an en dash."""
    if value is None or value is pd.NA:
        return MISSING
    try:
        v = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if math.isnan(v):
        return MISSING
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    return format(v, spec).replace("-", "−")


@dataclass
class Column:
    """A column of an HTML table: its CSV column, header, and number format (None: text)."""

    key: str
    header: str
    spec: str | Callable[[object], str] | None = None


@dataclass
class Tables:
    """Writes each table as CSV under ``folder`` and renders it as HTML."""

    folder: Path
    written: list[str] = field(default_factory=list)

    figures: list[str] = field(default_factory=list)    # files written in figures/

    def write(self, name: str, data: pd.DataFrame) -> None:
        """Write ``tables/<name>.csv``."""
        write_text(self.folder / f"{name}.csv", data.to_csv(index=False))
        self.written.append(f"{name}.csv")

    def render(self, name: str, data: pd.DataFrame, columns: list[Column], caption: str = "") -> str:
        """Write ``tables/<name>.csv`` (all of ``data``) and return the HTML table of ``columns``."""
        self.write(name, data)
        head = "".join(f"<th>{esc(c.header)}</th>" for c in columns)
        body = []
        for _, row in data.iterrows():
            cells = []
            for c in columns:
                v = row[c.key]
                if c.spec is None:
                    text = MISSING if v is None or (isinstance(v, float) and math.isnan(v)) else esc(v)
                    cells.append(f'<td data-col="{esc(c.key)}">{text}</td>')
                else:
                    text = c.spec(v) if callable(c.spec) else number(v, c.spec)
                    cells.append(f'<td class="n" data-col="{esc(c.key)}">{text}</td>')
            body.append("<tr>" + "".join(cells) + "</tr>")
        cap = f"<caption>{caption} <span class=files>(tables/{esc(name)}.csv)</span></caption>" if caption else \
            f"<caption><span class=files>tables/{esc(name)}.csv</span></caption>"
        return (f'<div class="wide"><table data-csv="tables/{esc(name)}.csv">{cap}<thead><tr>{head}</tr></thead>'
                f'<tbody>{"".join(body)}</tbody></table></div>')


def figure(b64_png: str, name: str, alt: str, caption: str) -> str:
    return (f'<figure id="fig-{esc(name)}"><img src="data:image/png;base64,{b64_png}" alt="{esc(alt)}">'
            f"<figcaption>{caption} <span class=files>Files: figures/{esc(name)}.png, .svg; plotted data "
            f"figures/{esc(name)}.csv.</span></figcaption></figure>")


def section(anchor: str, title: str, body: str) -> str:
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>\n{body}\n</section>'


def page(title: str, subtitle: str, sections: list[tuple[str, str, str]]) -> str:
    """The whole page: (anchor, title, body HTML) per section, a contents list at the top."""
    nav = "".join(f'<li><a href="#{esc(a)}">{esc(t)}</a></li>' for a, t, _ in sections)
    body = "\n".join(section(a, t, b) for a, t, b in sections)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{esc(title)}</title><style>{CSS}</style></head><body>"
            f"<h1>{esc(title)}</h1><p class=sub>{subtitle}</p><nav><ol>{nav}</ol></nav>\n{body}\n</body></html>\n")
