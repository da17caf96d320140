"""Turn edges from files into a graph directory that every GRAPH argument takes.

`shardtrain ingest SOURCE... --out GRAPH_DIR` reads every SOURCE (an .npz bundle, .mtx,
edge list .csv .tsv .txt .edges, a raw m x 2 integer .npy, or Apache Parquet: a .parquet
file or a folder of them, with --src/--dst naming the id columns), makes the edge set
undirected and simple (self-loops and duplicates dropped and counted) and writes it as
memory-mapped CSR arrays plus a manifest. The sort is external: edges are bucketed to disk
and each bucket sorted alone, so the work stays within --memory-budget whatever the size of
the graph. Nothing is left behind when it fails or is killed.

`shardtrain ingest --sql URL --edges-query "SELECT a, b FROM ..." [--vertices-query "SELECT
id, label, f1, ... FROM ..."] --out GRAPH_DIR` reads a database instead (sqlite:///PATH or
postgresql://USER@HOST:PORT/DB): the ids, integers or text, become 0..n-1 and the directory
keeps the original ones, which every output naming vertices shows.
"""
from __future__ import annotations

import time
from pathlib import Path

from shardtrain.cli.common import (
    add_memory_budget_argument,
    terminal_progress,
)
from shardtrain.data.memory import default_memory_budget
from shardtrain.errors import InputError


def add_arguments(parser) -> None:
    parser.add_argument("sources", metavar="SOURCE", nargs="*",
                        help="edge files or folders of .parquet files (all are read)")
    parser.add_argument("--sql", metavar="URL",
                        help="read the graph from a database instead: sqlite:///PATH or "
                             "postgresql://USER@HOST:PORT/DB (a password is never printed; "
                             "PG* variables and ~/.pgpass work)")
    parser.add_argument("--edges-query", metavar="SQL",
                        help="with --sql: SELECT of two vertex id columns, one row per edge")
    parser.add_argument("--vertices-query", metavar="SQL",
                        help="with --sql: SELECT id[, label[, feature columns...]], one row "
                             "per vertex (NULL label: unlabelled); without it the vertices "
                             "are the edge endpoints")
    parser.add_argument("--out", metavar="GRAPH_DIR", required=True,
                        help="graph directory to write")
    parser.add_argument("--src", metavar="COL", default="src",
                        help="Parquet column of the first vertex id (default src)")
    parser.add_argument("--dst", metavar="COL", default="dst",
                        help="Parquet column of the second vertex id (default dst)")
    parser.add_argument("--features", metavar="FILE",
                        help="vertex features, .npy (copied in chunks) or .csv")
    parser.add_argument("--labels", metavar="FILE",
                        help="vertex labels, .npy or text with one integer per line (-1 = none)")
    add_memory_budget_argument(parser)
    parser.add_argument("--overwrite", action="store_true",
                        help="replace GRAPH_DIR if it exists (only once the new one is complete)")


def run(args) -> int:
    from shardtrain.data.ingest import Progress, Source, ingest, open_source
    from shardtrain.files import check_paths
    from shardtrain.units import human_bytes

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()) and not args.overwrite:
        raise InputError(f"--out {out}: directory exists and is not empty (add --overwrite)")
    if args.sql is None:
        for flag, value in (("--edges-query", args.edges_query),
                            ("--vertices-query", args.vertices_query)):
            if value is not None:
                raise InputError(f"{flag}: only with --sql URL")
        if not args.sources:
            raise InputError("SOURCE: give edge files, or --sql URL --edges-query SQL")
    else:
        if args.sources:
            raise InputError(f"SOURCE {args.sources[0]}: --sql reads the database instead; "
                             f"give one or the other")
        if args.edges_query is None:
            raise InputError("--sql: needs --edges-query \"SELECT a, b FROM ...\"")
        for flag, value in (("--features", args.features), ("--labels", args.labels)):
            if value is not None:
                raise InputError(f"{flag}: with --sql, select the vertex data in "
                                 f"--vertices-query")
    if args.src == args.dst:
        raise InputError(f"--src {args.src!r} and --dst {args.dst!r}: name two columns")
    check_paths(inputs={"SOURCE": args.sources, "--features": args.features,
                        "--labels": args.labels}, replaced_dirs={"--out": out})
    budget = args.memory_budget or default_memory_budget()
    start = time.perf_counter()
    sources: list[Source]
    if args.sql is not None:
        from shardtrain.data.sqlsource import SqlSource
        sources = [SqlSource(args.sql, args.edges_query, args.vertices_query)]
    else:
        sources = [open_source(p, args.src, args.dst) for p in args.sources]
    progress: Progress = terminal_progress()
    result = ingest(sources, out, budget=budget, features=args.features, labels=args.labels,
                    overwrite=args.overwrite, progress=progress)
    for note in result.manifest["notes"]:
        print(f"note: {note}")
    c = result.cleanup
    print(f"wrote {out}/: {result.num_vertices:,} vertices, {result.num_edges:,} edges from "
          f"{result.rows:,} rows ({c.self_loops:,} self-loops and {c.duplicates:,} duplicates "
          f"dropped); {result.buckets} sort bucket{'s' * (result.buckets != 1)} within "
          f"{human_bytes(budget)} ({time.perf_counter() - start:.1f} s)")
    return 0
