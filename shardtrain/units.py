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


_SIZE_FACTORS = {"": 1, "B": 1, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40, "P": 2**50}


def parse_size(text: str, option: str = "--memory-budget") -> int:
    """'512M' -> 536870912: an integer or decimal number of bytes with an optional binary
    suffix K, M, G, T or P (powers of 1024; 'KiB', 'KB', 'k' and a trailing 'B' are taken
    too). InputError naming `option` for anything else, and for sizes below one byte."""
    import re

    from shardtrain.errors import InputError

    match = re.fullmatch(r"\s*(\d+(?:\.\d*)?|\.\d+)\s*([kKmMgGtTpP]?)(?:i?[bB])?\s*",
                         str(text))
    if match is None:
        raise InputError(f"{option} {text!r}: expected a size such as 512M, 4G or 1073741824")
    value = float(match.group(1)) * _SIZE_FACTORS[match.group(2).upper()]
    if value < 1 or value > 2**62:
        raise InputError(f"{option} {text!r}: must be between 1 byte and 4 EiB")
    return int(value)
