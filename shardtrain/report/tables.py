"""Readable plain-text tables and byte sizes, for the commands' terminal output.

`format_table(rows, columns)`: columns are (key, header, fmt) where fmt is a format spec
("{:,}", "{:.2f}") or a callable value -> str. Numbers are right-aligned, text left-aligned.
"""
from __future__ import annotations

from numbers import Number
from typing import Any, Callable, Sequence, Union

Fmt = Union[str, Callable[[Any], str], None]   # a function gets the cell's value

def _cell(value, fmt: Fmt) -> str:
    if value is None:
        return "-"
    if callable(fmt):
        return fmt(value)
    if fmt:
        return fmt.format(value)
    return str(value)


def format_table(rows: list[dict], columns: Sequence[tuple[str, str, Fmt]]) -> str:
    """Aligned text: a header line, a rule, one line per row; missing keys show '-'."""
    headers = [header for _, header, _ in columns]
    cells = [[_cell(row.get(key), fmt) for key, _, fmt in columns] for row in rows]
    numeric = [all(isinstance(row.get(key), Number) or row.get(key) is None for row in rows)
               and any(isinstance(row.get(key), Number) for row in rows)
               for key, _, _ in columns]
    widths = [max([len(h)] + [len(r[i]) for r in cells]) for i, h in enumerate(headers)]

    def line(values):
        parts = [v.rjust(w) if num else v.ljust(w)
                 for v, w, num in zip(values, widths, numeric)]
        return "  ".join(parts).rstrip()

    out = [line(headers), "  ".join("-" * w for w in widths)]
    out.extend(line(r) for r in cells)
    return "\n".join(out)
