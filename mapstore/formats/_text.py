"""Arrow tables as plain text, for terminals and logs."""

from __future__ import annotations

__all__ = ["text_table"]


def _format_cell(v: object, width: int = 40) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        text = f"{v:.6g}"
    elif isinstance(v, (list, tuple)):
        text = "[" + ",".join(_format_cell(x, 12) for x in v) + "]"
    else:
        text = str(v)
    text = text.replace("\n", " ")
    return text if len(text) <= width else text[: width - 1] + "…"


def text_table(table, max_rows: int | None = None, width: int = 40) -> str:
    """A plain-text table of an Arrow table (cells cut at ``width`` characters)."""
    names = table.column_names
    rows = table.to_pylist() if max_rows is None else table.slice(0, max_rows).to_pylist()
    cells = [[_format_cell(r[n], width) for n in names] for r in rows]
    widths = [max([len(n)] + [len(c[i]) for c in cells]) for i, n in enumerate(names)]
    out = ["  ".join(n.ljust(w) for n, w in zip(names, widths)),
           "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in cells]
    shown = len(rows)
    out.append(f"({table.num_rows} row{'s' if table.num_rows != 1 else ''}"
               + (f", first {shown} shown" if shown < table.num_rows else "") + ")")
    return "\n".join(out)


def plural(n: int, one: str, many: str | None = None) -> str:
    """A count said as a person would.

    >>> plural(1, "study"), plural(3, "study", "studies"), plural(1200, "map")
    ('1 study', '3 studies', '1,200 maps')
    """
    return f"{n:,} {one if n == 1 else many or one + 's'}"
