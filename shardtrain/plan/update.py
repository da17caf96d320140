"""Update a shard directory from a delta: new vertices, new and removed edges.

What a shard directory holds (`plan/shards.py`): every vertex is owned by exactly one shard,
and each shard stores its owned rows of Â with global column ids (through `owned` and
`halo`) plus the owned rows' vertex data. So the whole graph comes back from the shards
(`read_shard_graph`): an owned row's entries other than its self-loop are its edges, and a
row's length minus one is its degree. The manifest's `graph_fingerprint` is checked
against the graph read back this way.

An update (`update_plan`):
1. reads the delta (`read_delta`): edge files in any format `readers.read_edge_rows` reads,
   new vertices as an npz bundle (`readers.read_vertex_bundle`), new ids n, n+1, ... in
   bundle order; every row is checked against the graph (one line naming file and row);
2. applies it (`apply_delta`): removals first, then additions; loops and edges already
   present are dropped (noted);
3. keeps every existing vertex on its worker and places the new ones by the Fennel score
   under the `fennel` load limit (`partition.place_vertices`);
4. rebuilds only the shards that change (`changed_workers`): a shard changes when it owns
   a new vertex or a row of Â whose values or columns change. Â_vu = 1/sqrt(d̃_v d̃_u)
   changes exactly in the rows of the touched vertices T (ends of an added or removed
   edge, new vertices) and of their neighbours N(T): T's degrees change. The halo of a
   shard changes only through an edge of one of its rows (a row of T), and p's send list
   to q only when q's halo group for p changes (an edge at a vertex of p in T). Every other
   shard is kept as it was, with the graph-wide counts of its header (vertices, training
   vertices) and the new split id, which every shard file carries;
5. the result equals `build_shards` of the new graph with the final assignment, array for
   array (tests/test_update.py checks it against a split from scratch).
"""
from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from shardtrain import defaults
from shardtrain.data.graph import Graph, fingerprint
from shardtrain.data.masks import MASK_KEYS
from shardtrain.data.readers import EdgeRows, read_edge_rows, read_vertex_bundle
from shardtrain.errors import InputError, ParameterError, option
from shardtrain.plan.partition import METHODS, partition_plan, place_vertices
from shardtrain.plan.shards import (
    SHARDS_MANIFEST,
    Shard,
    _index_dtype,
    check_shard_dir,
    load_shard,
    rebuild_shards,
    save_shards,
)

UPDATE_FORMAT = "shardtrain-update"
UPDATE_VERSION = 1


# ----------------------------------------------------------------------------- reading shards

@dataclass
class ShardGraph:
    """The graph and plan a shard directory holds."""

    graph: Graph
    assignment: np.ndarray          # int64 (n,)
    workers: int
    manifest: dict
    shards: list[Shard]
    notes: list = field(default_factory=list)


def is_shard_dir(path) -> bool:
    """A folder with a shard manifest (`shards.SHARDS_MANIFEST`)."""
    return Path(path).is_dir() and (Path(path) / SHARDS_MANIFEST).is_file()


def read_shard_graph(path: str | os.PathLike) -> ShardGraph:
    """The whole graph, its vertex data and the assignment back from a shard directory
    (every shard checked as training checks it). Vectorised: one pass over each shard's
    entries and one sort of all edge keys."""
    path = Path(path)
    manifest = check_shard_dir(path)
    k, n = manifest["workers"], manifest["num_vertices"]
    shards = [load_shard(path, w) for w in range(k)]
    owned = np.concatenate([s.owned for s in shards])
    if owned.shape[0] != n or np.any(np.bincount(owned, minlength=n) != 1):
        raise InputError(f"{path}: the shards do not own each of the {n} vertices exactly "
                         f"once (not one split)")
    assignment = np.repeat(np.arange(k, dtype=np.int64), [s.num_owned for s in shards])
    assignment[owned] = assignment.copy()
    keys = []
    for s in shards:
        rows = np.repeat(s.owned, np.diff(s.adj.indptr))
        cols = np.concatenate([s.owned, s.halo])[s.adj.indices]
        off = rows != cols
        keys.append(rows[off] * np.int64(n) + cols[off])
    key = np.sort(np.concatenate(keys))
    del keys
    rows, cols = np.divmod(key, np.int64(n))
    del key
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=indptr[1:])
    vertex_data: dict[str, np.ndarray | None] = {}
    for name in ("features", "labels") + MASK_KEYS:
        parts = [getattr(s, name) for s in shards]
        if any(p is None for p in parts):
            vertex_data[name] = None
            continue
        first = parts[0]
        full = np.empty((n,) + first.shape[1:], dtype=first.dtype)
        full[owned] = np.concatenate(parts)
        vertex_data[name] = full
    graph = Graph(indptr, cols, **vertex_data)
    notes = []
    if fingerprint(graph) != manifest.get("graph_fingerprint"):
        # a split of a graph directory has that directory's fingerprint; the edges must at
        # least be symmetric for the graph to be one
        back = np.sort(cols * np.int64(n) + rows)
        if not np.array_equal(back, rows * np.int64(n) + cols):
            raise InputError(f"{path}: the shards' rows are not symmetric (not one graph)")
        notes.append(f"{path}: the graph read back from the shards has another "
                     f"fingerprint than the manifest's (split from a graph directory?)")
    return ShardGraph(graph, assignment, k, manifest, shards, notes)


# ----------------------------------------------------------------------------- the delta

@dataclass
class Delta:
    """What changes, read from the user's files (ids not yet checked against a graph)."""

    add: EdgeRows | None = None
    remove: EdgeRows | None = None
    vertices: dict | None = None    # `readers.read_vertex_bundle`
    vertices_file: str | None = None

    @property
    def new_vertices(self) -> int:
        return 0 if self.vertices is None else int(self.vertices["num_vertices"])


def read_delta(add_edges=None, remove_edges=None, add_vertices=None, *, features=None,
               labels=None) -> Delta:
    """The delta's files read and checked on their own (`features`/`labels`: the new
    vertices' rows as `--features`/`--labels` files, in place of an `add_vertices` bundle)."""
    if features is not None or labels is not None:
        from shardtrain.data.readers import load_features, load_labels

        if add_vertices is not None:
            raise ParameterError("features" if features is not None else "labels",
                                 f"give the new vertices in {option('add_vertices')} or as "
                                 f"{option('features')}/{option('labels')} files, not both")
        bundle: dict = {}
        if features is not None:
            bundle["features"] = load_features(features)
        if labels is not None:
            bundle["labels"] = load_labels(labels)
        rows = {key: int(v.shape[0]) for key, v in bundle.items()}
        if len(set(rows.values())) > 1:
            raise ParameterError("labels", f"{rows['labels']} labels for "
                                           f"{rows['features']} new feature rows "
                                           f"({option('features')} {features})", value=labels)
        bundle["num_vertices"] = next(iter(rows.values()))
        delta = read_delta(add_edges, remove_edges)
        delta.vertices = bundle
        delta.vertices_file = str(features if features is not None else labels)
        return delta
    return Delta(
        add=None if add_edges is None else read_edge_rows(add_edges, param="add_edges"),
        remove=None if remove_edges is None else read_edge_rows(remove_edges,
                                                                param="remove_edges"),
        vertices=None if add_vertices is None else read_vertex_bundle(add_vertices,
                                                                      param="add_vertices"),
        vertices_file=None if add_vertices is None else str(add_vertices))


def _new_vertex_data(graph: Graph, delta: Delta) -> dict:
    """The vertex data of the new graph: the old rows, then the bundle's rows (labels -1
    and masks False where the bundle has none); InputError naming the bundle when its data
    does not fit the graph's."""
    where = delta.vertices_file
    add = delta.vertices or {"num_vertices": 0}
    n_add = int(add["num_vertices"])
    out: dict[str, np.ndarray | None] = {}
    for name in ("features", "labels") + MASK_KEYS:
        old = getattr(graph, name)
        new = add.get(name)
        if old is None:
            if new is not None:
                raise InputError(f"{where}: key {name!r}: the graph has no {name}")
            out[name] = None
            continue
        if new is None:
            if name == "features" and n_add:
                raise InputError(f"{where}: no key 'features': the graph's vertices have "
                                 f"{old.shape[1]} features, so new vertices need them too")
            new = (np.full(n_add, -1, dtype=old.dtype) if name == "labels"
                   else np.zeros((n_add,) + old.shape[1:], dtype=old.dtype))
        if name == "features":
            if new.shape[1] != old.shape[1]:
                raise InputError(f"{where}: key 'features': new vertices have "
                                 f"{new.shape[1]} features, the graph's have {old.shape[1]}")
            new = new.astype(old.dtype, copy=False)
        out[name] = np.concatenate([old, new.astype(old.dtype, copy=False)])
    return out


def _locate_first(rows: EdgeRows, bad: np.ndarray) -> str:
    return rows.locate(int(np.argmax(bad)))


def _check_ids(rows: EdgeRows, n_old: int, n_new: int) -> None:
    neg = (rows.src < 0) | (rows.dst < 0)
    if neg.any():
        raise InputError(f"{_locate_first(rows, neg)}: negative vertex id")
    big = (rows.src >= n_new) | (rows.dst >= n_new)
    if big.any():
        r = int(np.argmax(big))
        vid = max(int(rows.src[r]), int(rows.dst[r]))
        added = (f"nor is added (new ids {n_old}..{n_new - 1})" if n_new > n_old
                 else "and no vertices are added")
        raise InputError(f"{rows.locate(r)}: vertex {vid} neither exists (ids 0..{n_old - 1}) "
                         f"{added}")


def _sorted_unique(keys: np.ndarray) -> np.ndarray:
    keys = np.sort(keys)
    return keys[np.concatenate([[True], keys[1:] != keys[:-1]])] if keys.shape[0] else keys


def _member(sorted_keys: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """keys found in the ascending array sorted_keys (vectorised binary search)."""
    if sorted_keys.shape[0] == 0:
        return np.zeros(keys.shape[0], dtype=bool)
    at = np.minimum(np.searchsorted(sorted_keys, keys), sorted_keys.shape[0] - 1)
    return sorted_keys[at] == keys


def _both_ways(upper: np.ndarray, base: int) -> np.ndarray:
    """Sorted directed keys row * base + col of undirected keys lo * base + hi."""
    lo, hi = np.divmod(upper, np.int64(base))
    return np.sort(np.concatenate([upper, hi * np.int64(base) + lo]))


@dataclass
class Applied:
    graph: Graph
    touched: np.ndarray             # ascending ids whose degree or existence changed
    edges_added: int
    edges_removed: int
    notes: list


def apply_delta(graph: Graph, delta: Delta, *, allow_missing: bool = False) -> Applied:
    """The new graph: removals, then additions, then the new vertices' data appended.

    Refused (InputError naming the file and row): an id that neither exists nor is added,
    a negative id, a removal of an edge the graph does not have (skipped, with a note,
    under `allow_missing`), vertex data that does not fit the graph's. An edge removed and
    added again is no change. O(m) passes over the graph's entries (its directed keys are
    already sorted) plus sorts of the delta's rows; no sort of the whole edge set."""
    n_old = graph.num_vertices
    n_new = n_old + delta.new_vertices
    base = np.int64(n_new)
    notes: list[str] = []
    vertex_data = _new_vertex_data(graph, delta)
    rows = np.repeat(np.arange(n_old, dtype=np.int64), graph.degrees)
    old_dir = rows * base + graph.indices          # ascending: rows, then sorted columns
    upper = rows < graph.indices
    old_up = old_dir[upper]
    del rows, upper
    removed = np.zeros(0, dtype=np.int64)
    if delta.remove is not None:
        rem = delta.remove
        _check_ids(rem, n_old, n_new)
        lo, hi = np.minimum(rem.src, rem.dst), np.maximum(rem.src, rem.dst)
        rkey = lo * base + hi
        found = _member(old_up, rkey) & (lo != hi)
        if not found.all():
            r = int(np.argmin(found))
            missing = int(np.count_nonzero(~found))
            if not allow_missing:
                raise InputError(f"{rem.locate(r)}: edge {int(rem.src[r])} "
                                 f"{int(rem.dst[r])} is not in the graph (removal of a "
                                 f"missing edge; {option('allow_missing')} skips such rows)")
            notes.append(f"{rem.locate(r)}: and {missing - 1} more removal rows name no "
                         f"edge of the graph: skipped ({missing} rows)")
        removed = _sorted_unique(rkey[found])
    added = np.zeros(0, dtype=np.int64)
    if delta.add is not None:
        add = delta.add
        _check_ids(add, n_old, n_new)
        lo, hi = np.minimum(add.src, add.dst), np.maximum(add.src, add.dst)
        added = _sorted_unique((lo * base + hi)[lo != hi])
    came = added[~_member(old_up, added)]          # not in the graph before
    gone = removed[~_member(added, removed)]       # removed and not added again
    if delta.add is not None and delta.add.src.shape[0] > came.shape[0]:
        notes.append(f"{delta.add.src.shape[0] - came.shape[0]} added edge rows change "
                     f"nothing (loops, repeats, or edges already present)")
    keep = np.ones(old_dir.shape[0], dtype=bool)
    keep[np.searchsorted(old_dir, _both_ways(gone, n_new))] = False
    # two ascending runs: the stable sort (a merge of runs for integers) is linear here
    new_dir = np.sort(np.concatenate([old_dir[keep], _both_ways(came, n_new)]), kind="stable")
    del old_dir, keep
    new_rows, indices = np.divmod(new_dir, base)
    del new_dir
    indptr = np.zeros(n_new + 1, dtype=np.int64)
    np.cumsum(np.bincount(new_rows, minlength=n_new), out=indptr[1:])
    del new_rows
    new = Graph(indptr, indices, **vertex_data)
    ends = np.concatenate([gone, came])
    touched = np.zeros(n_new, dtype=bool)
    touched[ends // base] = True
    touched[ends % base] = True
    touched[n_old:] = True
    return Applied(new, np.flatnonzero(touched), int(came.shape[0]), int(gone.shape[0]),
                   notes)


def neighbours_of(graph: Graph, vertices: np.ndarray) -> np.ndarray:
    """The concatenated adjacency rows of `vertices` (vectorised gather of CSR slices)."""
    starts = graph.indptr[vertices]
    lengths = graph.indptr[vertices + 1] - starts
    if lengths.sum() == 0:
        return np.zeros(0, dtype=np.int64)
    offsets = np.repeat(starts - (np.cumsum(lengths) - lengths), lengths)
    return graph.indices[np.arange(int(lengths.sum()), dtype=np.int64) + offsets]


def changed_workers(graph: Graph, assignment: np.ndarray, touched: np.ndarray,
                    k: int) -> np.ndarray:
    """Workers owning a touched vertex or a neighbour of one in `graph` (the new graph; a
    removed edge's ends are both touched): the shards whose arrays change (module doc)."""
    rows = np.concatenate([touched, neighbours_of(graph, touched)])
    hit = np.zeros(k, dtype=bool)
    hit[assignment[rows]] = True
    return np.flatnonzero(hit)


# ----------------------------------------------------------------------------- drift

def plan_figures(graph: Graph, shards: list[Shard] | None, settings, label: str, *,
                 assignment: np.ndarray | None = None, k: int = 0) -> dict:
    """The plan's edge cut, replication factor, imbalances and payload per epoch: the
    survey's figures (`survey.plan_of_shards`) of these built shards of `graph` (any local
    order), or, with `shards` None, of `graph` split by `assignment` into `k` shards
    (`survey.survey_plan`)."""
    from shardtrain.plan.survey import model_shape, plan_of_shards, survey_plan

    _, hops = model_shape(graph, settings)
    itemsize = np.dtype(settings.dtype).itemsize
    if shards is None:
        assert assignment is not None
        plan = survey_plan(graph, label, k, hops=hops,
                           itemsize=itemsize, seed=settings.seed,
                           imbalance=settings.imbalance, assignment=assignment,
                           bias=settings.bias)
    else:
        fsize = None if graph.features is None else graph.features.dtype.itemsize
        plan = plan_of_shards(shards, label, graph.num_vertices, hops=hops, itemsize=itemsize,
                              bias=settings.bias, feature_itemsize=fsize,
                              details={"method": label}, times={})
    imb = plan["imbalance"]
    return {"edge_cut": plan["edge_cut"], "replication_factor": plan["replication_factor"],
            "owned_max_over_mean": imb["owned"]["max_over_mean"],
            "local_edges_max_over_mean": imb["local_edges"]["max_over_mean"],
            "halo_max_over_mean": imb["halo"]["max_over_mean"],
            "bytes_sent_max_over_mean": imb["bytes_sent"]["max_over_mean"],
            "epoch_payload_bytes": plan["epoch_payload_bytes"]}


# ----------------------------------------------------------------------------- the update

@dataclass
class UpdateResult:
    report: dict
    manifest: dict
    notes: list


def check_repartition_above(value) -> None:
    if value is not None and not (isinstance(value, (int, float)) and 0 <= value < 1e6):
        raise ParameterError("repartition_above", "must be a percentage >= 0", value=value)


def update_plan(shard_dir, out, *, add_edges=None, remove_edges=None, add_vertices=None,
                features=None, labels=None, allow_missing: bool = False, fresh: bool = True,
                repartition_above: float | None = None, settings=None,
                imbalance: float | None = None, overwrite: bool = False) -> UpdateResult:
    """Update the plan of `shard_dir` by the delta and write it to `out` (atomically).
    `fresh`: also partition the new graph from scratch by the plan's method and report both;
    `repartition_above` X: write the fresh plan when the updated plan's payload per epoch
    exceeds the fresh plan's by more than X %. `settings` (`survey.SurveySettings`): the
    model shape the payload is counted for; `imbalance`: the load limit of the placement
    and the fresh plan (default the plan's own, from the manifest's meta). Returns the
    report (`documents.UPDATE`)."""
    import time

    from shardtrain.plan.survey import SurveySettings

    check_repartition_above(repartition_above)
    if imbalance is not None and not 0.0 <= imbalance < 1.0:
        raise ParameterError("imbalance", "must be in [0, 1)", value=imbalance)
    if repartition_above is not None and not fresh:
        raise ParameterError("repartition_above", f"needs the fresh plan (drop "
                                                  f"{option('fresh')})", value=repartition_above)
    if (add_edges is None and remove_edges is None and add_vertices is None
            and features is None and labels is None):
        raise ParameterError("add_edges", "give at least one of it, "
                             f"{option('remove_edges')} or {option('add_vertices')}")
    times = {}
    t0 = time.perf_counter()
    held = read_shard_graph(shard_dir)
    delta = read_delta(add_edges, remove_edges, add_vertices, features=features,
                       labels=labels)
    t1 = time.perf_counter()
    times["read_s"] = t1 - t0
    old, k, manifest = held.graph, held.workers, held.manifest
    meta = dict(manifest.get("meta") or {})
    applied = apply_delta(old, delta, allow_missing=allow_missing)
    new = applied.graph
    n_old, n_new = old.num_vertices, new.num_vertices
    if imbalance is None:
        imbalance = float(meta.get("imbalance", defaults.IMBALANCE))
    start = np.concatenate([held.assignment, np.zeros(n_new - n_old, dtype=np.int64)])
    assignment = place_vertices(new, start, np.arange(n_old, n_new), k, imbalance=imbalance)
    changed = changed_workers(new, assignment, applied.touched, k)
    t2 = time.perf_counter()
    times["apply_s"] = t2 - t1

    method = manifest.get("method") or "assignment"
    if settings is None:
        settings = SurveySettings(imbalance=imbalance, seed=manifest.get("seed") or 0,
                                  input_dim=meta.get("input_dim"))
    notes = list(held.notes) + list(applied.notes)
    before = plan_figures(old, held.shards, settings, method)
    # the updated plan's shards: its figures are read off them, whichever plan is written
    num_train = 0 if new.train_mask is None else int(np.count_nonzero(new.train_mask))
    ix = _index_dtype(new.indices.shape[0] + n_new)
    kept, hit = {}, set(changed.tolist())
    for s in held.shards:
        if s.worker in hit or s.adj.indices.dtype != ix:
            continue
        kept[s.worker] = dataclasses.replace(s, num_vertices_global=n_new,
                                             num_train_global=num_train)
    rebuilt = [w for w in range(k) if w not in kept]
    shards = rebuild_shards(new, assignment, k, rebuilt, kept)
    t3 = time.perf_counter()
    times["build_s"] = t3 - t2
    after = plan_figures(new, shards, settings, method)
    fresh_doc, fresh_assignment, fresh_details = None, None, None
    if fresh:
        if method not in METHODS:
            notes.append(f"the plan was made by {method!r}, not a partition method: no fresh "
                         f"plan to compare")
        else:
            fresh_assignment, fresh_details = partition_plan(
                new, method, k, seed=int(manifest.get("seed") or 0), imbalance=imbalance)
            fresh_doc = plan_figures(new, None, settings, method, assignment=fresh_assignment,
                                    k=k)
    t4 = time.perf_counter()
    times["drift_s"] = t4 - t3
    excess = None
    if fresh_doc is not None and fresh_doc["epoch_payload_bytes"] > 0:
        excess = 100.0 * (after["epoch_payload_bytes"] / fresh_doc["epoch_payload_bytes"] - 1)
    repartitioned = (repartition_above is not None and excess is not None
                     and excess > repartition_above)
    if repartitioned:
        assert fresh_assignment is not None
        assignment = fresh_assignment
        shards = rebuild_shards(new, assignment, k, range(k), {})
        meta["partition"] = fresh_details
        rebuilt = list(range(k))
        times["build_s"] += time.perf_counter() - t4
    t4 = time.perf_counter()
    new_fp = fingerprint(new)
    record = {"from_split": manifest["split_id"], "vertices_added": n_new - n_old,
              "edges_added": applied.edges_added, "edges_removed": applied.edges_removed,
              "placement": "fennel", "repartitioned": repartitioned}
    meta.update(graph_fingerprint=new_fp, num_edges=new.num_edges, updates=int(
        meta.get("updates", 0)) + 1, update=record, source=str(shard_dir))
    if new.labels is not None:
        meta["num_classes"] = new.num_classes
    meta.setdefault("method", method)
    written = save_shards(out, shards, meta=meta, overwrite=overwrite)
    times["write_s"] = time.perf_counter() - t4
    report = {
        "format": UPDATE_FORMAT, "version": UPDATE_VERSION,
        "shard_dir": str(shard_dir), "out": str(out), "method": method, "workers": k,
        "graph": {"vertices_before": n_old, "vertices_after": n_new,
                  "edges_before": old.num_edges, "edges_after": new.num_edges},
        "delta": {"vertices_added": n_new - n_old, "edges_added": applied.edges_added,
                  "edges_removed": applied.edges_removed,
                  "touched_vertices": int(applied.touched.shape[0])},
        "rebuilt": rebuilt, "kept": [w for w in range(k) if w not in rebuilt],
        "before": before, "after": after, "fresh": fresh_doc,
        "payload_excess_percent": excess, "repartition_above": repartition_above,
        "repartitioned": repartitioned, "output_plan": "fresh" if repartitioned else "updated",
        "split_id": written["split_id"], "seconds": times, "notes": notes,
    }
    return UpdateResult(report, written, notes)
