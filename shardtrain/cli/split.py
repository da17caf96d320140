"""Split a graph into shards with halos and write them as a shard directory.

`shardtrain split GRAPH --workers K --method M --out DIR` partitions GRAPH into K parts and
writes DIR/shards.json plus one DIR/shard-NNNN.npz per worker; training and other tools can
then load one shard without the whole graph. `--assignment FILE` (.npy, or text with one
worker id per line in vertex order) takes a partition made elsewhere instead of --method.
"""
from __future__ import annotations

import time
from pathlib import Path

from shardtrain import defaults
from shardtrain.cli.common import (
    add_graph_arguments,
    add_memory_budget_argument,
    load_graph_from_args,
    positive_int_type,
)
from shardtrain.data.readers import require_regular_file
from shardtrain.errors import InputError


def _imbalance(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"--imbalance {text!r}: not a number") from None
    if not 0.0 <= value < 1.0:
        raise InputError(f"--imbalance {text!r}: must be in [0, 1), e.g. 0.03")
    return value


def add_arguments(parser) -> None:
    from shardtrain.plan.partition import METHODS

    add_graph_arguments(parser)
    parser.add_argument("--workers", metavar="K", type=positive_int_type("--workers"),
                        help="number of shards (optional with --assignment)")
    how = parser.add_mutually_exclusive_group(required=True)
    how.add_argument("--method", metavar="M", help=f"partition method: {', '.join(METHODS)}")
    how.add_argument("--assignment", metavar="FILE",
                     help="vertex -> worker file (.npy, or one worker id per line)")
    parser.add_argument("--imbalance", metavar="X", type=_imbalance, default=defaults.IMBALANCE,
                        help=f"allowed excess of the largest part over the mean "
                             f"(default {defaults.IMBALANCE:g})")
    add_memory_budget_argument(
        parser, help="for a graph directory: memory METIS may use, e.g. 4G (default a quarter "
                     "of this machine's memory); the streaming methods and the shard writer "
                     "need far less")
    parser.add_argument("--out", metavar="DIR", required=True, help="shard directory to write")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace DIR if it exists (only once the new shards are complete)")


def _check_out(out: Path, overwrite: bool) -> None:
    """Refuse a bad --out before any work is done."""
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: folder {out.parent} does not exist")
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise InputError(f"--out {out}: directory exists and is not empty (add --overwrite)")


def run(args) -> int:
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.partition import METHODS, check_workers, load_assignment, partition_plan
    from shardtrain.plan.shards import build_shards, edge_cut, save_shards, shard_stats

    out = Path(args.out)
    _check_out(out, args.overwrite)
    from shardtrain.files import check_paths
    check_paths(inputs={"GRAPH": args.graph, "--features": args.features,
                        "--labels": args.labels, "--assignment": args.assignment},
                replaced_dirs={"--out": out})
    if args.method is not None and args.method not in METHODS:
        raise InputError(f"--method {args.method!r}: unknown; expected one of {', '.join(METHODS)}")
    if args.method is not None and args.workers is None:
        raise InputError("--workers: required with --method")
    if args.assignment is not None:
        require_regular_file(args.assignment, param="assignment")

    from shardtrain.data.graphdir import is_graph_dir

    if is_graph_dir(args.graph):
        return _run_graph_dir(args, out, args.memory_budget)
    loaded = load_graph_from_args(args)
    graph = loaded.graph
    start = time.perf_counter()
    if args.assignment is not None:
        assignment, k = load_assignment(args.assignment, graph.num_vertices)
        if args.workers is not None and args.workers != k:
            raise InputError(f"--workers {args.workers}: {args.assignment} assigns "
                             f"vertices to {k} workers")
        method = "assignment"
    else:
        k = args.workers
        check_workers(k, graph.num_vertices)
        assignment, details = partition_plan(graph, args.method, k, seed=args.seed,
                                             imbalance=args.imbalance)
        method = args.method
    partitioned = time.perf_counter()
    shards = build_shards(graph, assignment, k)
    built = time.perf_counter()
    meta = {"method": method, "seed": args.seed, "imbalance": args.imbalance,
            "graph_fingerprint": fingerprint(graph), "num_edges": graph.num_edges,
            "input_dim": loaded.input_dim, "source": loaded.source}
    if graph.labels is not None:
        meta["num_classes"] = graph.num_classes
    if args.assignment is not None:
        meta["assignment_file"] = str(args.assignment)
    else:
        meta["partition"] = details      # how the plan was made (METIS: scheme, balance)
    save_shards(out, shards, meta=meta, overwrite=args.overwrite)

    stats = shard_stats(shards)
    cut = edge_cut(graph, assignment)
    n = graph.num_vertices
    replication = float((stats["owned"].sum() + stats["halo"].sum()) / n)
    owned = stats["owned"]
    for note in loaded.notes:
        print(f"note: {note}")
    print(f"split {loaded.source}: {n:,} vertices, {graph.num_edges:,} edges into {k} shards "
          f"by {method}")
    share = cut / graph.num_edges if graph.num_edges else 0.0
    print(f"edge cut {cut:,} ({share:.1%} of edges), replication factor {replication:.3f}, "
          f"largest shard {owned.max():,} vertices ({owned.max() / owned.mean():.3f} x mean), "
          f"halo {stats['halo'].min():,}..{stats['halo'].max():,} rows")
    print(f"partition {partitioned - start:.2f} s, shards {built - partitioned:.2f} s; "
          f"wrote {out}/ ({len(shards)} shard files + shards.json)")
    return 0


def _run_graph_dir(args, out: Path, budget: int | None) -> int:
    """GRAPH is a graph directory: the plan streams, and the shards are built and written
    one at a time (`plan.stream_split`), the same files as a split of the graph in memory."""
    from shardtrain.data.graphdir import open_graph_dir
    from shardtrain.plan.partition import check_workers
    from shardtrain.plan.stream_split import save_shards_streaming
    from shardtrain.plan.streaming import load_assignment_mapped, stream_partition

    for option, value in (("--features", args.features), ("--labels", args.labels)):
        if value is not None:
            raise InputError(f"{option}: {args.graph} is a graph directory, which holds its "
                             f"own vertex data (give it to `ingest` instead)")
    gd = open_graph_dir(args.graph)
    start = time.perf_counter()
    if args.assignment is not None:
        assignment, k = load_assignment_mapped(args.assignment, gd.num_vertices)
        if args.workers is not None and args.workers != k:
            raise InputError(f"--workers {args.workers}: {args.assignment} assigns "
                             f"vertices to {k} workers")
        method = "assignment"
    else:
        k = args.workers
        check_workers(k, gd.num_vertices)
        assignment, details = stream_partition(gd, args.method, k, seed=args.seed,
                                               imbalance=args.imbalance, memory_budget=budget)
        method = args.method
    partitioned = time.perf_counter()
    man = gd.manifest
    input_dim = man.get("input_dim") if man.get("input_dim") is not None else args.input_dim
    meta = {"method": method, "seed": args.seed, "imbalance": args.imbalance,
            "graph_fingerprint": man["fingerprint"], "num_edges": gd.num_edges,
            "input_dim": input_dim, "source": str(args.graph)}
    if man.get("has_labels"):
        meta["num_classes"] = int(man["num_classes"])
    if args.assignment is not None:
        meta["assignment_file"] = str(args.assignment)
    else:
        meta["partition"] = details
    written = save_shards_streaming(out, gd, assignment, k, meta=meta,
                                    overwrite=args.overwrite)
    built = time.perf_counter()
    stats = written["stats"]
    owned, halo, cut = stats["owned"], stats["halo"], stats["edge_cut"]
    n, m = gd.num_vertices, gd.num_edges
    replication = float((owned.sum() + halo.sum()) / n)
    print(f"split {args.graph}: {n:,} vertices, {m:,} edges into {k} shards by {method} "
          f"(one shard at a time)")
    share = cut / m if m else 0.0
    print(f"edge cut {cut:,} ({share:.1%} of edges), replication factor {replication:.3f}, "
          f"largest shard {owned.max():,} vertices ({owned.max() / owned.mean():.3f} x mean), "
          f"halo {halo.min():,}..{halo.max():,} rows")
    print(f"partition {partitioned - start:.2f} s, shards {built - partitioned:.2f} s; "
          f"wrote {out}/ ({k} shard files + shards.json)")
    return 0
