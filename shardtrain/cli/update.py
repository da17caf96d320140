"""Update a shard directory from a delta (new vertices, new and removed edges), and report drift.

`shardtrain update SHARD_DIR --add-edges FILE [--remove-edges FILE] [--add-vertices FILE]
--out NEW_DIR` keeps every vertex on its worker, places new vertices by the Fennel score
against the current plan (under the same load limit as the `fennel` method), rebuilds only
the shards whose rows change and keeps the others, and writes NEW_DIR atomically: the same
shards as a split of the new graph with that assignment. New vertices get ids after the
existing ones, in the order of the --add-vertices bundle (.npz: features, labels, masks,
or num_vertices), or of the --features/--labels files. It prints the plan's edge cut,
replication factor, imbalances and payload per epoch before and after the update and for
a fresh partition of the new graph by the plan's method (--no-fresh skips that);
--repartition-above X writes the fresh plan instead when the updated plan's payload
exceeds the fresh one's by more than X %.
"""
from __future__ import annotations

import sys
from pathlib import Path

from shardtrain import defaults
from shardtrain.cli.common import float_type, positive_int_type
from shardtrain.errors import InputError
from shardtrain.units import human_bytes


def _percent(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"--repartition-above {text!r}: not a number") from None
    if not 0.0 <= value < 1e6:
        raise InputError(f"--repartition-above {text!r}: must be a percentage >= 0, e.g. 15")
    return value


def add_arguments(parser) -> None:
    add = parser.add_argument
    add("shard_dir", metavar="SHARD_DIR", help="shard directory to update (from `split`)")
    add("--add-edges", metavar="FILE", help="edges to add (.npz, .mtx or text edge list; "
        "ids of existing or added vertices)")
    add("--remove-edges", metavar="FILE", help="edges to remove (same formats)")
    add("--add-vertices", metavar="FILE", help="new vertices (.npz: features, labels, "
        "train_mask, val_mask, test_mask, or num_vertices); they get the ids after the "
        "existing ones, in bundle order")
    add("--features", metavar="FILE", help="the new vertices' features instead of "
        "--add-vertices (.npy or .csv, one row per new vertex)")
    add("--labels", metavar="FILE", help="the new vertices' labels (.npy or one integer per "
        "line, -1 = none); masks of new vertices are all false")
    add("--allow-missing", action="store_true",
        help="skip removals of edges the graph does not have (with a note) instead of refusing")
    add("--out", metavar="NEW_DIR", required=True, help="shard directory to write")
    add("--overwrite", action="store_true",
        help="replace NEW_DIR if it exists (only once the new shards are complete)")
    add("--json", metavar="OUT.json", help="write the update report (drift) as JSON")
    add("--no-fresh", action="store_true",
        help="skip the fresh partition of the new graph (costly for METIS on large graphs)")
    add("--repartition-above", metavar="X", type=_percent, default=None,
        help="write the fresh plan instead when the updated plan's payload per epoch exceeds "
             "the fresh plan's by more than X percent")
    add("--imbalance", metavar="X", type=float_type("--imbalance"), default=None,
        help="load limit for placing new vertices and for the fresh plan (default the "
             "plan's own, from its manifest)")
    d = defaults
    add("--layers", type=positive_int_type("--layers"), default=d.LAYERS,
        help=f"GCN layers the payload is counted for (default {d.LAYERS})")
    add("--hidden", type=positive_int_type("--hidden"), default=d.HIDDEN,
        help=f"hidden width (default {d.HIDDEN})")
    add("--dtype", default=d.DTYPE, help=f"training dtype, float32 or float64 (default {d.DTYPE})")
    add("--bias", action="store_true", help="the model has biases (more to all-reduce)")
    add("--classes", type=positive_int_type("--classes"), default=None, metavar="C",
        help="number of classes, when the graph has no labels")
    add("--input-dim", metavar="D", type=positive_int_type("--input-dim"), default=None,
        help="feature width the payload is counted for, when the shards have no features")


def _row(name: str, figures: dict | None) -> str:
    if figures is None:
        return f"  {name:<8} -"
    return (f"  {name:<8} edge cut {figures['edge_cut']:>12,}  replication "
            f"{figures['replication_factor']:.3f}  owned imb "
            f"{figures['owned_max_over_mean']:.3f}  edges imb "
            f"{figures['local_edges_max_over_mean']:.3f}  sent imb "
            f"{figures['bytes_sent_max_over_mean']:.3f}  payload/epoch "
            f"{human_bytes(figures['epoch_payload_bytes'])}")


def run(args) -> int:
    from shardtrain.files import check_paths, write_json_atomic
    from shardtrain.plan.shards import load_manifest
    from shardtrain.plan.survey import SurveySettings
    from shardtrain.plan.update import update_plan

    out = Path(args.out)
    if not out.parent.is_dir():
        raise InputError(f"--out {out}: folder {out.parent} does not exist")
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a directory")
    if out.is_dir() and any(out.iterdir()) and not args.overwrite:
        raise InputError(f"--out {out}: directory exists and is not empty (add --overwrite)")
    if args.json is not None and not Path(args.json).parent.is_dir():
        raise InputError(f"--json: folder {Path(args.json).parent} does not exist")
    if (args.add_edges is None and args.remove_edges is None and args.add_vertices is None
            and args.features is None and args.labels is None):
        raise InputError("--add-edges: give at least one of --add-edges, --remove-edges, "
                         "--add-vertices")
    if args.repartition_above is not None and args.no_fresh:
        raise InputError("--repartition-above: needs the fresh plan (drop --no-fresh)")
    if args.imbalance is not None and not 0.0 <= args.imbalance < 1.0:
        raise InputError(f"--imbalance {args.imbalance}: must be in [0, 1), e.g. 0.03")
    check_paths(inputs={"SHARD_DIR": args.shard_dir, "--add-edges": args.add_edges,
                        "--remove-edges": args.remove_edges,
                        "--add-vertices": args.add_vertices, "--features": args.features,
                        "--labels": args.labels},
                outputs={"--json": args.json}, replaced_dirs={"--out": out})
    manifest = load_manifest(args.shard_dir)
    meta = manifest.get("meta") or {}
    settings = SurveySettings(layers=args.layers, hidden=args.hidden, dtype=args.dtype,
                              classes=args.classes,
                              input_dim=(args.input_dim if args.input_dim is not None
                                         else meta.get("input_dim")),
                              bias=args.bias,
                              imbalance=(args.imbalance if args.imbalance is not None
                                         else meta.get("imbalance", defaults.IMBALANCE)),
                              seed=manifest.get("seed") or defaults.SEED)
    result = update_plan(args.shard_dir, out, add_edges=args.add_edges,
                         remove_edges=args.remove_edges, add_vertices=args.add_vertices,
                         features=args.features, labels=args.labels,
                         allow_missing=args.allow_missing, fresh=not args.no_fresh,
                         repartition_above=args.repartition_above, settings=settings,
                         imbalance=args.imbalance, overwrite=args.overwrite)
    rep = result.report
    for note in result.notes:
        print(f"note: {note}", file=sys.stderr)
    g, dl = rep["graph"], rep["delta"]
    print(f"update {args.shard_dir}: +{dl['vertices_added']:,} vertices, "
          f"+{dl['edges_added']:,} / -{dl['edges_removed']:,} edges -> "
          f"{g['vertices_after']:,} vertices, {g['edges_after']:,} edges "
          f"({rep['workers']} workers, {rep['method']})")
    print(f"plan ({rep['method']}, payload per training epoch):")
    print(_row("before", rep["before"]))
    print(_row("after", rep["after"]))
    print(_row("fresh", rep["fresh"]))
    if rep["payload_excess_percent"] is not None:
        print(f"the updated plan's payload is {rep['payload_excess_percent']:+.1f} % of the "
              f"fresh plan's")
    if rep["repartitioned"]:
        print(f"above --repartition-above {rep['repartition_above']:g} %: wrote the FRESH "
              f"plan (every shard rebuilt)")
    else:
        kept = rep["kept"]
        print(f"rebuilt shards {rep['rebuilt']}, kept {len(kept)} unchanged"
              + (f" {kept}" if kept else ""))
    print(f"wrote {out}/ ({rep['workers']} shard files + shards.json)")
    if args.json is not None:
        write_json_atomic(args.json, rep)
    return 0
