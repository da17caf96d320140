"""Sizes and durations at a readable scale, for every stage's messages and tables."""
from __future__ import annotations

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
