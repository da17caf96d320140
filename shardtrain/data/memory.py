"""Refuse, before allocating, work that cannot fit in this machine's memory.

A tiny file can declare a huge size (`num_vertices = 10**12`, an `.npy` header of shape
(10**12, 2), one vertex id of 4e9, a Matrix Market size line of 10**9 x 10**9). The loaders
estimate the peak memory such a size implies and call `require_memory` before allocating
anything of that size, so the user gets one line saying how much would be needed instead of a
machine brought to a halt.

The estimates are peaks measured with `tracemalloc` (numpy reports its buffers to it) on
graphs of 0.2-2 M edge rows and 0.05-1 M vertices, rounded up; they are meant to be close,
not generous, so that nothing that fits is refused.
"""
from __future__ import annotations

import os
import resource

import numpy as np

from shardtrain.errors import InputError
from shardtrain.units import human_bytes

# load_graph: per edge row of the file, the rows themselves (16 B) plus csr_from_edges
# (self-loop mask, the undirected keys, their sort, both directions and their sort, the
# row/column split): measured 105 B.
LOAD_BYTES_PER_EDGE_ROW = 112
# load_graph: per vertex, indptr and the row counts: measured 16 B
LOAD_BYTES_PER_VERTEX = 24
# load_graph: per vertex when there are labels: the labels, the three masks and the split
# drawing (permutation, class order, ranks): measured ~33 B more
LOAD_BYTES_PER_LABELLED_VERTEX = 40

# synth peaks in one of two phases. Drawing the routes, per route (the sampled endpoints, the
# keys and their sort, the CSR): measured 105 B; per depot (labels, propensities, the
# sampler's sorted copies and cumulative weights, splits): measured 56 B.
SYNTH_BYTES_PER_ROUTE = 112
SYNTH_BYTES_PER_VERTEX = 64
# Then the features and the written edge array, while the CSR is kept: per route at most
# 54 B (measured bound), per feature value the float32 array and its class-mean term.
SYNTH_BYTES_PER_KEPT_ROUTE = 56
SYNTH_BYTES_PER_FEATURE_VALUE = 8


def graph_load_bytes(vertices: int, edge_rows: int, feature_bytes: int = 0,
                     labelled: bool = False) -> int:
    """Estimated peak bytes of loading a graph of this size (see the constants above);
    `feature_bytes` is what the features occupy meanwhile (`feature_bytes_of`)."""
    per_vertex = LOAD_BYTES_PER_VERTEX + (LOAD_BYTES_PER_LABELLED_VERTEX if labelled else 0)
    return (LOAD_BYTES_PER_EDGE_ROW * int(edge_rows) + per_vertex * int(vertices)
            + int(feature_bytes))


def feature_bytes_of(shape: tuple[int, ...], dtype) -> int:
    """Bytes of a features array of this declared shape and dtype while it is loaded: the
    array as stored, plus the float32 copy made of anything that is not float32 or float64."""
    values = 1
    for d in shape:
        values *= int(d)
    dtype = np.dtype(dtype)
    converted = 0 if dtype in (np.float32, np.float64) else 4 * values
    return values * dtype.itemsize + converted


def synth_bytes(vertices: int, routes: int, features: int) -> int:
    """Estimated peak bytes of generating and writing a parcel network of this size: the
    larger of its two phases (see the constants above)."""
    vertices, routes, features = int(vertices), int(routes), int(features)
    drawing = SYNTH_BYTES_PER_ROUTE * routes + SYNTH_BYTES_PER_VERTEX * vertices
    featuring = (SYNTH_BYTES_PER_KEPT_ROUTE * routes + SYNTH_BYTES_PER_VERTEX * vertices
                 + SYNTH_BYTES_PER_FEATURE_VALUE * vertices * features)
    return max(drawing, featuring)


def _cgroup_limit() -> int | None:
    """The container's memory limit (cgroup v2, else v1), or None when there is none."""
    for name in ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"):
        try:
            with open(name) as fh:
                text = fh.read().strip()
        except OSError:
            continue
        if text.isdigit() and int(text) < (1 << 60):   # v1 says "no limit" with a huge number
            return int(text)
    return None


def memory_limit() -> tuple[int, str]:
    """(bytes this process can count on, how to say where the limit comes from)."""
    try:
        physical = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        physical = None
    limits = []
    if physical and physical > 0:
        limits.append((physical, f"this machine has {human_bytes(physical)}"))
    cgroup = _cgroup_limit()
    if cgroup is not None:
        limits.append((cgroup, f"this container may use {human_bytes(cgroup)}"))
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft != resource.RLIM_INFINITY and soft > 0:
        limits.append((soft, f"this process may use {human_bytes(soft)} of address space"))
    if not limits:
        return (1 << 62), "no known limit"
    return min(limits)


def require_memory(nbytes: int, source: str, what: str = "load") -> None:
    """Raise InputError("SOURCE: would need 7.30 TiB of memory to load (this machine has
    23.5 GiB)") when `nbytes` exceeds the memory this process can count on."""
    limit, said = memory_limit()
    if nbytes > limit:
        raise InputError(f"{source}: would need {human_bytes(nbytes)} of memory to {what} "
                         f"({said})")


def default_memory_budget() -> int:
    """`--memory-budget`'s default for every command that streams: a quarter of the memory
    this process can count on (`memory_limit`), at least 64 MiB."""
    return max(memory_limit()[0] // 4, 64 << 20)
