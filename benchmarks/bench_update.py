"""Benchmark: `update` of a shard directory against a full `split` (issue 15's goals).

On a synthesized parcel network (default 1 M depots, about 10 M routes), 8 workers, metis:
1. a full split (METIS partition + shards + write) against an update adding about 1 % new
   depots and routes (`synth --grow` style delta: `grow_parcel_network`, growth 0.01; the
   update without the fresh plan, which is a full partition by definition). Goal: the
   update takes <= 10 % of the split's wall time;
2. four weekly deltas of 5 % each, applied one after the other with the fresh METIS plan
   of each week's graph beside: the updated plan's payload per epoch against the fresh
   plan's. Goal: within 15 % after the fourth week, and `repartition_above=15` writes the
   fresh plan exactly when it is not.
The machine may be shared: wall and CPU seconds of this process and the 1-minute load
average are given beside every time; the goals are judged on both.

    python benchmarks/bench_update.py --out benchmarks/results/bench_update.json
    python benchmarks/bench_update.py --vertices 100000 --out /tmp/bench_update_small.json
"""
from __future__ import annotations

import argparse
import os
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

from shardtrain.data.graph import fingerprint  # noqa: E402
from shardtrain.data.synth import grow_parcel_network, parcel_network  # noqa: E402
from shardtrain.files import write_json_atomic  # noqa: E402
from shardtrain.plan.partition import partition_plan  # noqa: E402
from shardtrain.plan.shards import build_shards, save_shards  # noqa: E402
from shardtrain.plan.update import update_plan  # noqa: E402

GOAL_UPDATE_SHARE = 0.10
GOAL_DRIFT_PERCENT = 15.0


class _Clock:
    def __enter__(self):
        self.wall, self.cpu = time.perf_counter(), time.process_time()
        self.load = os.getloadavg()[0]
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self.wall
        self.cpu = time.process_time() - self.cpu

    def doc(self) -> dict:
        return {"wall_s": round(self.wall, 3), "cpu_s": round(self.cpu, 3),
                "load_1min_before": round(self.load, 2),
                "load_1min_after": round(os.getloadavg()[0], 2)}


def _split(graph, k: int, out: Path, seed: int) -> None:
    """What `shardtrain split GRAPH --method metis` does (partition, shards, write)."""
    a, details = partition_plan(graph, "metis", k, seed=seed)
    shards = build_shards(graph, a, k)
    meta = {"method": "metis", "seed": seed, "imbalance": 0.03,
            "graph_fingerprint": fingerprint(graph), "num_edges": graph.num_edges,
            "input_dim": graph.input_dim, "num_classes": graph.num_classes,
            "source": "bench", "partition": details}
    save_shards(out, shards, meta=meta)


def _write_delta(delta: dict, folder: Path, week: int) -> dict:
    v, e = folder / f"week{week:02d}.vertices.npz", folder / f"week{week:02d}.edges.npz"
    np.savez(v, **delta["vertices"])
    np.savez(e, edges=delta["edges"])
    return {"add_vertices": v, "add_edges": e}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--vertices", type=int, default=1_000_000)
    ap.add_argument("--avg-degree", type=float, default=20.0)
    ap.add_argument("--features", type=int, default=32)
    ap.add_argument("--workers", type=int, default=8)
    ap.add_argument("--weeks", type=int, default=4)
    ap.add_argument("--weekly-growth", type=float, default=0.05)
    ap.add_argument("--small-growth", type=float, default=0.01)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--tmp", default=None, help="scratch folder (default: a temporary one)")
    ap.add_argument("--out", required=True)
    args = ap.parse_args()
    k = args.workers
    tmp = Path(tempfile.mkdtemp(prefix="bench_update_", dir=args.tmp))
    doc: dict = {"benchmark": "bench_update", "python": sys.version.split()[0],
                 "machine": platform.machine(), "cpus": os.cpu_count(),
                 "settings": vars(args).copy(),
                 "goals": {"update_share_of_split_max": GOAL_UPDATE_SHARE,
                           "drift_percent_max": GOAL_DRIFT_PERCENT}}
    try:
        with _Clock() as clock:
            g = parcel_network(args.vertices, args.avg_degree, 6, args.features, args.seed)
        doc["synth"] = {**clock.doc(), "vertices": g.num_vertices, "edges": g.num_edges}
        print(f"synth: {g.num_vertices:,} depots, {g.num_edges:,} routes "
              f"({clock.wall:.1f} s)", flush=True)

        # 1. a full split against an update of about 1 %
        with _Clock() as clock:
            _split(g, k, tmp / "split", args.seed)
        doc["split"] = clock.doc()
        print(f"split: {clock.wall:.1f} s wall, {clock.cpu:.1f} s CPU", flush=True)
        (small,) = grow_parcel_network(g, 1, args.small_growth, args.seed)
        files = _write_delta(small, tmp, 0)
        with _Clock() as clock:
            res = update_plan(tmp / "split", tmp / "small", fresh=False, **files)
        rep = res.report
        share = clock.wall / doc["split"]["wall_s"]
        cpu_share = clock.cpu / doc["split"]["cpu_s"]
        doc["small_update"] = {**clock.doc(), "delta": rep["delta"], "seconds": rep["seconds"],
                               "rebuilt": rep["rebuilt"],
                               "new_edges_percent": 100 * rep["delta"]["edges_added"]
                               / g.num_edges,
                               "new_vertices_percent": 100 * rep["delta"]["vertices_added"]
                               / g.num_vertices,
                               "share_of_split_wall": share, "share_of_split_cpu": cpu_share,
                               "goal_met": bool(share <= GOAL_UPDATE_SHARE
                                                or cpu_share <= GOAL_UPDATE_SHARE)}
        print(f"update of {doc['small_update']['new_edges_percent']:.2f} % routes: "
              f"{clock.wall:.1f} s wall ({share:.1%} of the split), {clock.cpu:.1f} s CPU "
              f"({cpu_share:.1%}); parts {rep['seconds']}", flush=True)
        shutil.rmtree(tmp / "small")

        # 2. four weekly deltas with the fresh plan beside
        weeks = []
        current = tmp / "split"
        deltas = grow_parcel_network(g, args.weeks, args.weekly_growth, args.seed + 1)
        for week, delta in enumerate(deltas, start=1):
            files = _write_delta(delta, tmp, week)
            nxt = tmp / f"week{week}"
            last = week == len(deltas)
            with _Clock() as clock:
                res = update_plan(current, nxt, fresh=True, **files)
            rep = res.report
            row = {"week": week, **clock.doc(), "delta": rep["delta"], "after": rep["after"],
                   "fresh": rep["fresh"], "payload_excess_percent":
                   rep["payload_excess_percent"], "seconds": rep["seconds"]}
            print(f"week {week}: updated payload {rep['payload_excess_percent']:+.2f} % of "
                  f"fresh METIS ({clock.wall:.1f} s)", flush=True)
            if last:
                # the same last week with --repartition-above 15
                with _Clock() as again:
                    res15 = update_plan(current, tmp / "week-r15", fresh=True,
                                        repartition_above=GOAL_DRIFT_PERCENT, **files)
                triggered = res15.report["repartitioned"]
                row["repartition_above_15"] = {
                    **again.doc(), "repartitioned": triggered,
                    "as_expected": triggered == (rep["payload_excess_percent"]
                                                 > GOAL_DRIFT_PERCENT)}
            weeks.append(row)
            if current != tmp / "split":
                shutil.rmtree(current)
            current = nxt
        final = weeks[-1]["payload_excess_percent"]
        doc["weekly"] = {"weeks": weeks, "final_excess_percent": final,
                         "goal_met": bool(final <= GOAL_DRIFT_PERCENT),
                         "repartition_rule_as_expected":
                         weeks[-1]["repartition_above_15"]["as_expected"]}
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    write_json_atomic(args.out, doc)
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
