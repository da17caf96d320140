"""Write the demo parcel-delivery network (depots, truck routes, depot roles) as an .npz bundle.

Depots are vertices, daily truck routes are edges, features are weekly volume and facility
statistics, labels are depot roles. A degree-corrected block model with power-law degrees and
class-correlated features; the same seed gives the same file.
"""
from __future__ import annotations

import time
from pathlib import Path

from shardtrain import defaults
from shardtrain.cli.common import add_memory_budget_argument, float_type, int_type
from shardtrain.data.synth import edge_array, parcel_network, same_role_fraction
from shardtrain.errors import InputError
from shardtrain.files import check_paths, save_npz_atomic


def add_arguments(parser) -> None:
    parser.add_argument("out", metavar="OUT.npz", nargs="?",
                        help="bundle to write (or --out GRAPH_DIR)")
    parser.add_argument("--out", dest="out_dir", metavar="GRAPH_DIR",
                        help="write a graph directory instead, drawn in pieces and sorted on "
                             "disk (for networks larger than memory; same generator, not the "
                             "same draws as OUT.npz)")
    d = defaults
    parser.add_argument("--vertices", type=int_type("--vertices"), default=d.SYNTH_VERTICES,
                        help=f"depots (default {d.SYNTH_VERTICES})")
    parser.add_argument("--avg-degree", type=float_type("--avg-degree"),
                        default=d.SYNTH_AVG_DEGREE,
                        help=f"mean routes per depot (default {d.SYNTH_AVG_DEGREE:g})")
    parser.add_argument("--classes", type=int_type("--classes"), default=d.SYNTH_CLASSES,
                        help=f"depot roles (default {d.SYNTH_CLASSES}: hub, urban, suburban, "
                             f"rural, cross-dock, returns)")
    parser.add_argument("--features", type=int_type("--features"), default=d.SYNTH_FEATURES,
                        help=f"statistics per depot (default {d.SYNTH_FEATURES})")
    parser.add_argument("--seed", type=int_type("--seed"), default=d.SEED,
                        help=f"random seed (default {d.SEED})")
    parser.add_argument("--homophily", type=float_type("--homophily"), default=d.HOMOPHILY,
                        help=f"fraction of routes between depots of the same role "
                             f"(default {d.HOMOPHILY:g})")
    parser.add_argument("--degree-exponent", type=float_type("--degree-exponent"),
                        default=d.DEGREE_EXPONENT,
                        help=f"power-law exponent of the degree tail "
                             f"(default {d.DEGREE_EXPONENT:g})")
    parser.add_argument("--signal", type=float_type("--signal"), default=d.SIGNAL,
                        help=f"strength of the role signal in the features (default {d.SIGNAL:g})")
    parser.add_argument("--grow", type=int_type("--grow"), default=None, metavar="WEEKS",
                        help="also write one delta per week of growth beside OUT.npz "
                             "(OUT.weekWW.vertices.npz and OUT.weekWW.edges.npz, for "
                             "`shardtrain update --add-vertices ... --add-edges ...`)")
    parser.add_argument("--growth", type=float_type("--growth"), default=d.SYNTH_GROWTH,
                        metavar="RATE", help=f"new depots per week as a share of the network "
                                             f"(default {d.SYNTH_GROWTH:g}); new ones attach "
                                             f"preferentially to busy depots")
    add_memory_budget_argument(parser)


def week_files(out: Path, week: int) -> tuple[Path, Path]:
    """(vertices, edges) bundles of one week's delta beside OUT.npz."""
    stem = out.with_suffix("")
    return (stem.with_name(f"{stem.name}.week{week:02d}.vertices.npz"),
            stem.with_name(f"{stem.name}.week{week:02d}.edges.npz"))


def run(args) -> int:
    if (args.out is None) == (args.out_dir is None):
        raise InputError("give one output: OUT.npz or --out GRAPH_DIR")
    if args.out_dir is not None:
        if args.grow is not None:
            raise InputError("--grow: writes deltas beside OUT.npz, not with --out GRAPH_DIR")
        return _run_dir(args)
    out = Path(args.out)
    if out.suffix.lower() != ".npz":
        raise InputError(f"{out}: the output must be an .npz file")
    if not out.parent.is_dir():
        raise InputError(f"{out}: folder {out.parent} does not exist")
    weekly = {}
    if args.grow is not None:
        from shardtrain.data.synth import _check_growth

        _check_growth(args.grow, args.growth)
        for week in range(1, args.grow + 1):
            weekly[f"--grow week {week}"] = list(week_files(out, week))
    elif args.growth != defaults.SYNTH_GROWTH:
        raise InputError("--growth: give --grow WEEKS as well")
    check_paths(outputs={"OUT.npz": out, **weekly})
    start = time.perf_counter()
    graph = parcel_network(args.vertices, args.avg_degree, args.classes, args.features,
                           args.seed, homophily=args.homophily,
                           degree_exponent=args.degree_exponent, signal=args.signal)
    save_npz_atomic(out, edges=edge_array(graph), num_vertices=graph.num_vertices,
                    features=graph.features, labels=graph.labels, train_mask=graph.train_mask,
                    val_mask=graph.val_mask, test_mask=graph.test_mask)
    print(f"wrote {out}: {graph.num_vertices:,} depots, {graph.num_edges:,} routes, "
          f"{graph.num_classes} roles, {graph.input_dim} features, same-role routes "
          f"{same_role_fraction(graph):.3f}, max routes per depot {int(graph.degrees.max())} "
          f"({time.perf_counter() - start:.1f} s)")
    if args.grow is not None:
        from shardtrain.data.synth import grow_parcel_network

        deltas = grow_parcel_network(graph, args.grow, args.growth, args.seed,
                                     homophily=args.homophily)
        for week, delta in enumerate(deltas, start=1):
            vertices, edges = week_files(out, week)
            save_npz_atomic(vertices, **delta["vertices"])
            save_npz_atomic(edges, edges=delta["edges"])
            print(f"wrote week {week}: {vertices.name} "
                  f"({delta['vertices']['labels'].shape[0]:,} new depots), {edges.name} "
                  f"({delta['edges'].shape[0]:,} new routes)")
    return 0


def _run_dir(args) -> int:
    """synth --out GRAPH_DIR: the streamed network through ingest's external sort."""
    from shardtrain.cli.common import terminal_progress
    from shardtrain.data.memory import default_memory_budget
    from shardtrain.data.synth import ParcelStream, write_parcel_dir
    from shardtrain.units import human_bytes

    out = Path(args.out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()):
        raise InputError(f"--out {out}: directory exists and is not empty")
    check_paths(replaced_dirs={"--out": out})
    budget = args.memory_budget or default_memory_budget()
    start = time.perf_counter()
    stream = ParcelStream(args.vertices, args.avg_degree, args.classes, args.features,
                          args.seed, homophily=args.homophily,
                          degree_exponent=args.degree_exponent, signal=args.signal)
    result = write_parcel_dir(stream, out, budget=budget, progress=terminal_progress())
    print(f"wrote {out}/: {result.num_vertices:,} depots, {result.num_edges:,} routes, "
          f"{args.classes} roles, {args.features} features; {result.cleanup.duplicates:,} "
          f"repeated draws dropped; {result.buckets} sort bucket"
          f"{'s' * (result.buckets != 1)} within {human_bytes(budget)} "
          f"({time.perf_counter() - start:.1f} s)")
    return 0
