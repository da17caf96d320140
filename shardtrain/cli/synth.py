"""Write the demo parcel-delivery network (depots, truck routes, depot roles) as an .npz bundle.

Depots are vertices, daily truck routes are edges, features are weekly volume and facility
statistics, labels are depot roles. A degree-corrected block model with power-law degrees and
class-correlated features; the same seed gives the same file.
"""
from __future__ import annotations

import time
from pathlib import Path

from shardtrain.cli.common import float_type, int_type
from shardtrain.data.synth import edge_array, parcel_network, same_role_fraction
from shardtrain.errors import InputError
from shardtrain.files import check_paths, save_npz_atomic


def add_arguments(parser) -> None:
    parser.add_argument("out", metavar="OUT.npz", help="bundle to write")
    parser.add_argument("--vertices", type=int_type("--vertices"), default=10_000,
                        help="depots (default 10000)")
    parser.add_argument("--avg-degree", type=float_type("--avg-degree"), default=10.0,
                        help="mean routes per depot (default 10)")
    parser.add_argument("--classes", type=int_type("--classes"), default=6,
                        help="depot roles (default 6: hub, urban, suburban, rural, cross-dock, "
                             "returns)")
    parser.add_argument("--features", type=int_type("--features"), default=32,
                        help="statistics per depot (default 32)")
    parser.add_argument("--seed", type=int_type("--seed"), default=0,
                        help="random seed (default 0)")
    parser.add_argument("--homophily", type=float_type("--homophily"), default=0.8,
                        help="fraction of routes between depots of the same role (default 0.8)")
    parser.add_argument("--degree-exponent", type=float_type("--degree-exponent"), default=2.5,
                        help="power-law exponent of the degree tail (default 2.5)")
    parser.add_argument("--signal", type=float_type("--signal"), default=1.5,
                        help="strength of the role signal in the features (default 1.5)")


def run(args) -> int:
    out = Path(args.out)
    if out.suffix.lower() != ".npz":
        raise InputError(f"{out}: the output must be an .npz file")
    if not out.parent.is_dir():
        raise InputError(f"{out}: folder {out.parent} does not exist")
    check_paths(outputs={"OUT.npz": out})
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
    return 0
