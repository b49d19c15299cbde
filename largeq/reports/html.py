"""One-page, self-contained HTML report for a run folder.

The page shows each section's plots on the left and its numbers on the right (a two-column
grid that folds to one column on narrow screens).  Images are embedded as base64 data URIs
and the CSS is inline, so the file still works after being moved or e-mailed.  All text is
HTML-escaped.
"""

from __future__ import annotations

import base64
import html
import math
import os
from dataclasses import dataclass, field
from numbers import Number
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from largeq.reports.store import atomic_write_text, utc_timestamp

__all__ = ["Section", "format_number", "format_value_error", "write_report"]

_MIME = {".png": "image/png", ".svg": "image/svg+xml", ".jpg": "image/jpeg",
         ".jpeg": "image/jpeg", ".gif": "image/gif"}

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:0 auto;
max-width:1250px;padding:1em 1.5em;color:#222;background:#fafafa;line-height:1.4}
h1{font-size:1.5em;margin:.2em 0 .1em}
.sub{color:#666;font-size:.85em;margin-bottom:1em}
section{background:#fff;border:1px solid #ddd;border-radius:6px;padding:.6em 1em;
margin:0 0 1em}
h2{font-size:1.15em;margin:.2em 0 .5em;border-bottom:1px solid #eee}
.grid{display:grid;grid-template-columns:minmax(0,3fr) minmax(0,2fr);gap:1em;
align-items:start}
.figs img{max-width:100%;height:auto;display:block;margin:0 0 .5em}
.missing{color:#a00;font-style:italic}
table{border-collapse:collapse;width:100%;font-size:.88em}
th,td{text-align:left;padding:.2em .5em;border-bottom:1px solid #eee;vertical-align:top}
td.num{font-family:ui-monospace,Menlo,Consolas,monospace;white-space:nowrap}
th{background:#f3f3f3}
p{margin:.3em 0 .6em}
table.wide{margin-top:.6em}
.headline{border:2px solid #4a7;background:#f6fff8}
.headline table{font-size:.95em}
.headline td.label{font-weight:600;white-space:nowrap}
.headline tr.notsettled td.label{color:#b30}
pre{background:#f5f5f5;border:1px solid #e3e3e3;padding:.5em;overflow-x:auto;font-size:.85em}
ul.terms{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.85em}
span.num{font-family:ui-monospace,Menlo,Consolas,monospace}
@media (max-width:900px){.grid{grid-template-columns:1fr}}
"""


@dataclass(frozen=True)
class Section:
    """One block of the report.

    Parameters
    ----------
    heading : str
        Section title.
    images : sequence of str
        Image paths relative to the report's folder (or absolute).
    table : sequence of rows
        Each row is ``(label, value)`` or ``(label, value, error_or_comment)``; a numeric
        third entry is shown as ``value ± error``, a string as a comment.
    paragraphs : sequence of str
        Free text shown above the grid.
    items : sequence of str
        A bulleted list (shown in a fixed-width font, e.g. the Hamiltonian's terms).
    preformatted : str, optional
        Text shown verbatim (escaped), e.g. the scenario TOML.
    columns, rows : sequences, optional
        A full-width table with a header row (``columns``) under the plots, one row per entry of
        ``rows`` (cells are formatted with :func:`format_number`).
    """

    heading: str
    images: Sequence[str] = ()
    table: Sequence[Sequence[Any]] = ()
    paragraphs: Sequence[str] = field(default_factory=tuple)
    items: Sequence[str] = ()
    preformatted: str | None = None
    columns: Sequence[str] = ()
    rows: Sequence[Sequence[Any]] = ()


def _is_number(x: Any) -> bool:
    return isinstance(x, (Number, np.number)) and not isinstance(x, (bool, np.bool_))


def format_number(x: Any, digits: int = 4) -> str:
    """Format a number with ``digits`` significant digits (ints exactly; NaN as "n/a").

    Parameters
    ----------
    x : number or other
        Value; non-numbers are returned as ``str(x)``.
    digits : int
        Significant digits for floats.

    Returns
    -------
    str
    """
    if x is None:
        return "n/a"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return f"{int(x):,}".replace(",", "\u2009") if abs(int(x)) >= 10**5 else str(int(x))
    if isinstance(x, (complex, np.complexfloating)):
        z = complex(x)
        sign = "-" if z.imag < 0 else "+"
        return f"{format_number(z.real, digits)} {sign} {format_number(abs(z.imag), digits)}i"
    if _is_number(x):
        v = float(x)
        if math.isnan(v):
            return "n/a"
        if math.isinf(v):
            return "∞" if v > 0 else "−∞"
        if v == 0:
            return "0"
        text = f"{v:.{digits}g}"
        if "e" in text:
            mant, exp = text.split("e")
            return f"{mant}×10^{int(exp)}"
        return text
    if isinstance(x, np.ndarray) and x.ndim == 0:
        return format_number(x.item(), digits)
    return str(x)


def format_value_error(value: Any, error: Any) -> str:
    """Format ``value ± error`` with the error to 2 significant digits.

    The value is rounded to the error's last digit, e.g. ``(1.23456, 0.0123)`` gives
    ``"1.235 ± 0.012"``.  Falls back to :func:`format_number` when the error is not a
    positive finite number.
    """
    if not (_is_number(value) and _is_number(error)):
        return format_number(value)
    v, e = float(value), abs(float(error))
    if not (math.isfinite(v) and math.isfinite(e)) or e == 0:
        return format_number(value)
    exp = math.floor(math.log10(e)) - 1  # decimal exponent of the error's second digit
    if -6 <= exp <= 4 and abs(v) < 1e6:
        decimals = max(0, -exp)
        return f"{round(v, -exp):.{decimals}f} ± {round(e, -exp):.{decimals}f}"
    return f"{format_number(v, 4)} ± {format_number(e, 2)}"


def _image_tag(src: str, folder: Path) -> str:
    p = Path(src)
    full = p if p.is_absolute() else folder / p
    mime = _MIME.get(full.suffix.lower())
    if mime is None or not full.is_file():
        why = "unsupported image type" if mime is None and full.is_file() else "image not found"
        return f'<p class="missing">{html.escape(why)}: {html.escape(src)}</p>'
    data = base64.b64encode(full.read_bytes()).decode("ascii")
    alt = html.escape(p.stem.replace("_", " "), quote=True)
    return f'<img src="data:{mime};base64,{data}" alt="{alt}" title="{alt}">'


def _row(row: Sequence[Any]) -> str:
    if len(row) < 2:
        raise ValueError(f"table row needs at least (label, value): {row!r}")
    label, value = row[0], row[1]
    extra = row[2] if len(row) > 2 else None
    if extra is not None and _is_number(value) and _is_number(extra):
        val_text, comment = format_value_error(value, extra), ""
    else:
        val_text = format_number(value)
        comment = "" if extra is None else format_number(extra)
    if len(row) > 3:
        comment = " ".join(filter(None, [comment, *(format_number(c) for c in row[3:])]))
    cls = ' class="num"' if _is_number(value) else ""
    return (f"<tr><td>{html.escape(str(label))}</td><td{cls}>{html.escape(val_text)}</td>"
            f"<td>{html.escape(comment)}</td></tr>")


def _section(sec: Section, folder: Path) -> str:
    parts = ["<section>", f"<h2>{html.escape(sec.heading)}</h2>"]
    parts += [f"<p>{html.escape(p)}</p>" for p in sec.paragraphs]
    if sec.items:
        parts.append('<ul class="terms">' + "".join(f"<li>{html.escape(i)}</li>" for i in sec.items) + "</ul>")
    if sec.preformatted is not None:
        parts.append(f"<pre>{html.escape(sec.preformatted)}</pre>")
    figs = "".join(_image_tag(src, folder) for src in sec.images)
    table = ""
    if sec.table:
        rows = "".join(_row(r) for r in sec.table)
        if all(len(r) < 3 or r[2] in (None, "") for r in sec.table):
            rows = rows.replace("<td></td></tr>", "</tr>")
            head = "<th>quantity</th><th>value</th>"
        else:
            head = "<th>quantity</th><th>value</th><th>error / note</th>"
        table = f"<table><thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"
    if figs and table:
        parts.append(f'<div class="grid"><div class="figs">{figs}</div><div>{table}</div></div>')
    elif figs or table:
        parts.append(f'<div class="figs">{figs}</div>' if figs else table)
    if sec.columns:
        head = "".join(f"<th>{html.escape(str(c))}</th>" for c in sec.columns)
        body = "".join("<tr>" + "".join(f'<td class="num">{html.escape(format_number(c))}</td>' if _is_number(c)
                                        else f"<td>{html.escape(str(c))}</td>" for c in r) + "</tr>"
                       for r in sec.rows)
        parts.append(f'<table class="wide"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>')
    parts.append("</section>")
    return "\n".join(parts)


def _headline(lines) -> str:
    """The answer block: one row per headline line, numbers tagged with their summary key."""
    rows = []
    for ln in lines:
        cls = ' class="notsettled"' if ln.status == "not settled" else ""
        cells = []
        for part in ln.parts:
            if hasattr(part, "key"):
                attrs = ""
                if part.key is not None:
                    attrs += f' data-key="{html.escape(part.key, quote=True)}"'
                if part.value is not None:
                    attrs += f' data-value="{float(part.value)!r}"'
                cells.append(f'<span class="num"{attrs}>{html.escape(part.text)}</span>')
            else:
                cells.append(html.escape(str(part)))
        rows.append(f'<tr{cls}><td class="label">{html.escape(ln.label)}</td><td>{"".join(cells)}</td></tr>')
    return ('<section class="headline" id="answer"><h2>The answer</h2><table><tbody>'
            + "".join(rows) + "</tbody></table></section>")


def write_report(
    path: str | os.PathLike,
    *,
    title: str,
    sections: Sequence[Section],
    subtitle: str | None = None,
    headline: Sequence[Any] | None = None,
) -> Path:
    """Write a one-page self-contained HTML report.

    Parameters
    ----------
    path : path-like
        Output file, usually ``<run>/report.html``; relative image paths are resolved
        against its folder.
    title : str
        Page title and heading.
    sections : sequence of Section
        Blocks shown in order.
    subtitle : str, optional
        One line under the title (defaults to the UTC creation time).
    headline : sequence of reports.headline.HeadlineLine, optional
        The answer, shown first (numbers carry ``data-key``/``data-value`` attributes).

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    folder = path.parent
    sub = subtitle if subtitle is not None else f"written {utc_timestamp()} by largeq"
    body = "\n".join(_section(s, folder) for s in sections)
    if headline:
        body = _headline(headline) + "\n" + body
    page = (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{html.escape(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"<h1>{html.escape(title)}</h1>\n<div class=\"sub\">{html.escape(sub)}</div>\n"
        f"{body}\n</body>\n</html>\n"
    )
    return atomic_write_text(path, page)
