"""Readable plain-text tables and byte sizes, for the commands' terminal output.

`format_table(rows, columns)`: columns are (key, header, fmt) where fmt is a format spec
("{:,}", "{:.2f}") or a callable value -> str. Numbers are right-aligned, text left-aligned.
"""
from __future__ import annotations

from numbers import Number
from typing import Any, Callable, Sequence, Union

Fmt = Union[str, Callable[[Any], str], None]   # a function gets the cell's value

_UNITS = ("B", "KiB", "MiB", "GiB", "TiB", "PiB")


def human_seconds(v) -> str:
    """Seconds at a readable scale: 1.23 s, 45.6 ms, 789 us; "-" for None."""
    if v is None:
        return "-"
    v = float(v)
    if v >= 1:
        return f"{v:.2f} s"
    if v >= 1e-3:
        return f"{v * 1e3:.1f} ms"
    return f"{v * 1e6:.0f} us"


def human_bytes(n: float) -> str:
    """Binary units, about three significant figures: 0 B, 512 B, 1.50 KiB, 12.3 MiB, 456 GiB."""
    n = float(n)
    sign = "-" if n < 0 else ""
    n = abs(n)
    for unit in _UNITS:
        if n < 1024 or unit == _UNITS[-1]:
            break
        n /= 1024
    if unit == "B":
        return f"{sign}{int(n)} B"
    text = f"{n:.0f}" if n >= 100 else f"{n:.1f}" if n >= 10 else f"{n:.2f}"
    return f"{sign}{text} {unit}"


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
