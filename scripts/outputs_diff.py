"""Compare two snapshots of ``scripts/outputs_snapshot.py``: every JSON, CSV and npz file.

    python scripts/outputs_diff.py BEFORE_DIR AFTER_DIR     (or two JSON files)

JSON documents must be equal key by key except timing fields: a key ending in ``_s``, holding
``_s_per_``, named ``seconds`` or ending in ``rss_bytes`` (and everything under such a key),
and the demo forecast's ``fastest`` plan (chosen by the demo's own timing, see TIMED_CHOICES).
CSV files must be equal byte for byte, npz files array by array (bits and dtype), and both
snapshots must hold the same files. Prints each difference; exit status 1 when there is one.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np


def is_timing(key: str) -> bool:
    return key.endswith("_s") or "_s_per_" in key or key == "seconds" or key.endswith("rss_bytes")


# The demo times this machine itself (no shared calibration), so the forecast's choice of its
# fastest plan follows that timing where plans are within microseconds of each other.
TIMED_CHOICES = {"demo/forecast.json": ("fastest",), "demo/demo.json": ("fastest",)}


def differences(a: object, b: object, path: str, out: list[str],
                skip: tuple[str, ...] = ()) -> None:
    if isinstance(a, dict) and isinstance(b, dict):
        for key in sorted(set(a) | set(b)):
            if is_timing(key) or (path == "" and key in skip):
                continue
            if key not in a or key not in b:
                out.append(f"{path}.{key}: only in {'after' if key in b else 'before'}")
            else:
                differences(a[key], b[key], f"{path}.{key}", out)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{path}: {len(a)} items before, {len(b)} after")
        for i, (x, y) in enumerate(zip(a, b)):
            differences(x, y, f"{path}[{i}]", out)
    elif a != b or type(a) is not type(b):
        out.append(f"{path}: {a!r} before, {b!r} after")


def compare(before: Path, after: Path) -> list[str]:
    if before.is_file() and after.is_file():        # two JSON documents
        found: list[str] = []
        differences(json.loads(before.read_text()), json.loads(after.read_text()), "", found)
        return found
    kept = {".json", ".csv", ".npz"}
    names_a = {p.relative_to(before) for p in before.rglob("*") if p.suffix in kept}
    names_b = {p.relative_to(after) for p in after.rglob("*") if p.suffix in kept}
    out = [f"{name}: only before" for name in sorted(names_a - names_b)]
    out += [f"{name}: only after" for name in sorted(names_b - names_a)]
    for name in sorted(names_a & names_b):
        fa, fb = before / name, after / name
        found = []
        if name.suffix == ".json":
            differences(json.loads(fa.read_text()), json.loads(fb.read_text()), "", found,
                        TIMED_CHOICES.get(name.as_posix(), ()))
        elif name.suffix == ".csv":
            if fa.read_bytes() != fb.read_bytes():
                found.append("contents differ")
        else:
            with np.load(fa, allow_pickle=False) as za, np.load(fb, allow_pickle=False) as zb:
                if sorted(za.files) != sorted(zb.files):
                    found.append(f"arrays {sorted(za.files)} before, {sorted(zb.files)} after")
                for key in sorted(set(za.files) & set(zb.files)):
                    x, y = za[key], zb[key]
                    if x.dtype != y.dtype or x.shape != y.shape or x.tobytes() != y.tobytes():
                        found.append(f"array {key} differs")
        out += [f"{name}: {line}" for line in found]
    return out


def main() -> int:
    before, after = Path(sys.argv[1]), Path(sys.argv[2])
    found = compare(before, after)
    for line in found:
        print(line)
    print(f"{len(found)} difference(s) between {before} and {after}")
    return 1 if found else 0


if __name__ == "__main__":
    raise SystemExit(main())
