"""Small HTML tables for notebooks (``_repr_html_``): a caption and rows of cells, every value escaped."""

from __future__ import annotations

import html
from typing import Any, Iterable

__all__ = ["html_table"]


def html_table(caption: str, header: Iterable[str], rows: Iterable[Iterable[Any]], limit: int = 20) -> str:
    """A caption and a table of at most ``limit`` rows (the rest counted), escaped.

    >>> html_table("x", ["a"], [[1], ["<b>"]])
    '<table><caption>x</caption><tr><th>a</th></tr><tr><td>1</td></tr><tr><td>&lt;b&gt;</td></tr></table>'
    """
    rows = list(rows)
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in r) + "</tr>" for r in rows[:limit])
    more = f"<tr><td colspan=99>... {len(rows) - limit} more</td></tr>" if len(rows) > limit else ""
    return f"<table><caption>{html.escape(caption)}</caption><tr>{head}</tr>{body}{more}</table>"
