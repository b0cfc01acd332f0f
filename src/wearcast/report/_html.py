"""HTML pieces for the report: escaping, number formats, tables, figures, the page.

Standard library only (``html`` and ``string.Template``). Every value that
comes from data is escaped. Numbers a reader may check against the run's
files carry ``data-field`` / ``data-value`` attributes holding the unrounded
value, so tests (and curious readers) can compare them with the CSV/JSON.
"""

from __future__ import annotations

import base64
import html
import math
from importlib import resources
from string import Template
from typing import Any, Callable, Iterable, Sequence

import pandas as pd

_PAGE = Template("""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="wearcast $version">
<title>$title</title>
<style>
$css
</style>
</head>
<body>
<main class="page">
$body
</main>
</body>
</html>
""")


def esc(value: Any) -> str:
    """Text made safe for HTML content and attribute values."""
    return html.escape("" if value is None else str(value), quote=True)


def is_missing(value: Any) -> bool:
    if value is None:
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def raw_value(value: Any) -> str:
    """The unrounded value as it goes into ``data-value`` (repr of floats)."""
    if is_missing(value):
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int,)) or (hasattr(value, "dtype") and getattr(value.dtype, "kind", "") in "iu"):
        return str(int(value))
    if isinstance(value, float) or (hasattr(value, "dtype") and getattr(value.dtype, "kind", "") == "f"):
        return repr(float(value))
    return str(value)


def fmt_count(value: Any) -> str:
    """A count of failures or units: whole numbers plain, others with one decimal."""
    if is_missing(value):
        return "–"
    value = float(value)
    if math.isclose(value, round(value), abs_tol=1e-9):
        return f"{int(round(value)):,}"
    return f"{value:,.1f}"


def fmt_expected(value: Any) -> str:
    """An expected number of failures, always with one decimal (it is an average)."""
    return "–" if is_missing(value) else f"{float(value):,.1f}"


def fmt_percent(value: Any, decimals: int = 1) -> str:
    """A probability in [0, 1] as a percentage."""
    return "–" if is_missing(value) else f"{100.0 * float(value):.{decimals}f} %"


def fmt_number(value: Any, decimals: int = 3) -> str:
    return "–" if is_missing(value) else f"{float(value):.{decimals}f}"


def fmt_years(days: Any) -> str:
    """An age in days shown in years with one decimal."""
    return "–" if is_missing(days) else f"{float(days) / 365.25:.1f}"


def fmt_text(value: Any) -> str:
    return "" if is_missing(value) else str(value)


def number(value: Any, fmt: Callable[[Any], str], field: str, **attrs: Any) -> str:
    """A ``<span>`` showing ``fmt(value)`` that carries the raw value."""
    extra = "".join(f' data-{esc(k.replace("_", "-"))}="{esc(v)}"' for k, v in attrs.items())
    return (f'<span class="num" data-field="{esc(field)}" data-value="{esc(raw_value(value))}"{extra}>'
            f"{esc(fmt(value))}</span>")


class Column:
    """How one table column is shown: header, the source field and a format."""

    def __init__(self, header: str, field: str, fmt: Callable[[Any], str] = fmt_text,
                 *, numeric: bool = True, render: Callable[[pd.Series], str] | None = None):
        self.header, self.field, self.fmt, self.numeric, self.render = header, field, fmt, numeric, render

    def cell(self, row: pd.Series) -> str:
        if self.render is not None:
            return f"<td>{self.render(row)}</td>"
        value = row.get(self.field)
        if self.numeric and not isinstance(value, str):
            return f'<td class="n">{number(value, self.fmt, self.field)}</td>'
        return f"<td>{esc(self.fmt(value))}</td>"


def table(frame: pd.DataFrame, columns: Sequence[Column], *, caption: str = "", cls: str = "",
          row_key: str | None = None, table_id: str = "") -> str:
    """An HTML table; ``row_key`` names the column put in each row's ``data-key``."""
    head = "".join(f'<th scope="col"{" class=n" if c.numeric and c.render is None else ""}>{esc(c.header)}</th>'
                   for c in columns)
    rows = []
    for _, row in frame.iterrows():
        key = f' data-key="{esc(row[row_key])}"' if row_key else ""
        rows.append(f"<tr{key}>" + "".join(c.cell(row) for c in columns) + "</tr>")
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    ident = f' id="{esc(table_id)}"' if table_id else ""
    return (f'<div class="table-wrap"><table class="{esc(cls)}"{ident}>{cap}<thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table></div>")


def simple_table(rows: Iterable[tuple[str, str]], *, caption: str = "", cls: str = "pairs") -> str:
    """Two-column label/value table; values are given as ready HTML."""
    body = "".join(f'<tr><th scope="row">{esc(label)}</th><td class="n">{value}</td></tr>' for label, value in rows)
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return f'<div class="table-wrap"><table class="{esc(cls)}">{cap}<tbody>{body}</tbody></table></div>'


def figure(name: str, png: bytes, alt: str, caption: str, *, wide: bool = True) -> str:
    """A figure with the PNG embedded as a base64 data URI and a plain caption."""
    data = base64.b64encode(png).decode("ascii")
    cls = "fig wide" if wide else "fig"
    return (f'<figure class="{cls}" id="fig-{esc(name)}" data-figure="{esc(name)}">'
            f'<img src="data:image/png;base64,{data}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def section(anchor: str, heading: str, body: str, *, lead: str = "") -> str:
    lead_html = f'<p class="lead">{esc(lead)}</p>' if lead else ""
    return f'<section id="{esc(anchor)}"><h2>{esc(heading)}</h2>{lead_html}{body}</section>'


def paragraph(text: str) -> str:
    return f"<p>{esc(text)}</p>"


def note(text: str) -> str:
    return f'<p class="note">{esc(text)}</p>'


def bullet_list(items: Iterable[str], *, raw: bool = False) -> str:
    inner = "".join(f"<li>{item if raw else esc(item)}</li>" for item in items)
    return f"<ul>{inner}</ul>"


def contents(entries: Sequence[tuple[str, str]]) -> str:
    links = "".join(f'<li><a href="#{esc(a)}">{esc(h)}</a></li>' for a, h in entries)
    return f'<nav class="contents" aria-label="Contents"><ol>{links}</ol></nav>'


def stylesheet() -> str:
    """The package's style.css (inlined into the page, never linked)."""
    return resources.files("wearcast.report").joinpath("style.css").read_text(encoding="utf-8")


def page(title: str, body: str, version: str) -> str:
    return _PAGE.substitute(title=esc(title), css=stylesheet(), body=body, version=esc(version))
