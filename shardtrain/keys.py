"""The integer mixer every counter-based random choice is keyed with (dropout masks, halo
keep sets, compressed-row rounding, GAT's attention dropout): one copy for every stage."""
from __future__ import annotations

GOLDEN64 = 0x9E3779B97F4A7C15
MASK64 = (1 << 64) - 1


def splitmix64(x: int) -> int:
    """SplitMix64 finaliser (Steele, Lea & Flood 2014) on a Python int, mod 2^64."""
    x = (x + GOLDEN64) & MASK64
    x = ((x ^ (x >> 30)) * 0xBF58476D1CE4E5B9) & MASK64
    x = ((x ^ (x >> 27)) * 0x94D049BB133111EB) & MASK64
    return x ^ (x >> 31)
