"""Forecast against a measured run with an emulated link, side by side in one run.

On a synthesized parcel network, 2 workers (no more than this machine's 2 cores) train over
pipes with `LinkModel(gbps, latency)` emulated on every frame, for several link speeds.
The forecast of the same plan (cores=2, pipes as the local transport) takes each worker's
compute from `calibrate.shards_step_seconds` (the worker's own code on its shard, one
thread, no transfer, the k workers at once as in the run), timed just before and just
after each run (this machine's speed drifts with other tenants) and the transfer from the link model plus the calibrated fixed cost
of a transport call; it is compared with the measured median epoch time (`epoch_s`: the
slowest worker's training step, the evaluation forward excluded). Beside it: the forecast
with compute timed once at the start, from counted work only (kernel speeds), and with
each worker's measured share of a core (the sharing of the cores modelled explicitly).
Goal: within 15 % at each speed from 5 down to 0.05 Gbit/s. Figures are only meaningful
on a quiet machine: the load average is recorded beside every run (trust load < ~2.5).

    python benchmarks/bench_forecast.py --out benchmarks/results/bench_forecast.json
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path


def _cpu_seconds() -> dict:
    """Machine-wide busy and stolen CPU seconds so far (/proc/stat), or {} elsewhere."""
    try:
        with open("/proc/stat") as f:
            fields = [int(x) for x in f.readline().split()[1:]]
    except (OSError, ValueError):
        return {}
    tick = os.sysconf("SC_CLK_TCK")
    user, nice, system, idle, iowait, irq, softirq, steal = (fields + [0] * 8)[:8]
    return {"busy": (user + nice + system + irq + softirq) / tick, "steal": steal / tick}


def _measure(shard_dir, settings, link, warmup: int) -> dict:
    from shardtrain.coordinator import train_partitioned

    load_before = os.getloadavg()
    cpu0, own0, wall0 = _cpu_seconds(), time.process_time(), time.perf_counter()
    res = train_partitioned(shard_dir, settings, link=link, timeout_s=300.0)
    cpu1, own1, wall1 = _cpu_seconds(), time.process_time(), time.perf_counter()
    times = [e["epoch_s"] for e in res.epochs[warmup:]]
    cpu = sum(w["cpu_s"] for w in res.workers)
    wall = sum(w["compute_s"] for w in res.workers)
    return {"median_epoch_s": statistics.median(times), "min_epoch_s": min(times),
            "max_epoch_s": max(times), "epochs_timed": len(times),
            "load_average_before": list(load_before), "load_average_after":
                list(os.getloadavg()),
            # share of a core each worker got while computing (others share this machine)
            "cpu_share_per_worker": min(1.0, cpu / max(wall, 1e-9)),
            # cores other people's processes kept busy during the run: machine-wide busy
            # CPU minus this run's workers and coordinator, over the run's wall time
            "other_busy_cores": ((cpu1["busy"] - cpu0["busy"] - cpu - (own1 - own0))
                                 / (wall1 - wall0)) if cpu0 else None,
            "stolen_cores": ((cpu1["steal"] - cpu0["steal"]) / (wall1 - wall0))
                            if cpu0 else None}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=10.0)
    ap.add_argument("--features", type=int, default=64)
    ap.add_argument("--hidden", type=int, default=16)
    ap.add_argument("--classes", type=int, default=6)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--method", default="metis")
    ap.add_argument("--epochs", type=int, default=14, help="per run; the first 2 are warm-up")
    ap.add_argument("--repeats", type=int, default=2,
                    help="rounds over all link speeds (alternating); best median is kept")
    ap.add_argument("--links", default="5,0.5,0.05", help="Gbit/s, comma-separated")
    ap.add_argument("--latency-us", type=float, default=50.0)
    ap.add_argument("--compute-epochs", type=int, default=8,
                    help="epochs of the compute measurement (the first is a warm-up)")
    args = ap.parse_args(argv)

    from shardtrain.calibrate import (calibrate, shard_step_seconds, shards_step_seconds,
                                      with_graph_sparse)
    from shardtrain.files import write_json_atomic
    from shardtrain.forecast import forecast_plan
    from shardtrain.graph import fingerprint
    from shardtrain.partition import partition
    from shardtrain.settings import TrainSettings
    from shardtrain.shards import build_shards, load_shard, save_shards
    from shardtrain.survey import SurveySettings, survey
    from shardtrain.synth import parcel_network
    from shardtrain.transport.link import LinkModel

    t0 = time.perf_counter()
    graph = parcel_network(args.vertices, args.avg_degree, args.classes, args.features, seed=7)
    k = args.workers
    assignment = partition(graph, args.method, k, seed=0)
    settings = TrainSettings(hidden=args.hidden, epochs=args.epochs, dtype="float32")
    surveyed = survey(graph, [args.method], [k],
                      SurveySettings(hidden=args.hidden, dtype="float32"), assignment=assignment)
    plan, model = surveyed["plans"][0], surveyed["model"]
    links = [float(x) for x in args.links.split(",")]
    result = {"benchmark": "forecast vs emulated-link measurement",
              "command": "python benchmarks/bench_forecast.py " + " ".join(sys.argv[1:]),
              "graph": {"vertices": graph.num_vertices, "edges": graph.num_edges,
                        "features": args.features},
              "model": {"hidden": args.hidden, "classes": args.classes, "layers": 2},
              "workers": k, "method": args.method, "epochs": args.epochs,
              "latency_us": args.latency_us,
              "plan": {"halo": [s["halo"] for s in plan["shards"]],
                       "epoch_payload_bytes": plan.get("epoch_payload_bytes")}}
    with tempfile.TemporaryDirectory(prefix="bench-forecast-") as tmp:
        shard_dir = Path(tmp) / "shards"
        save_shards(shard_dir, build_shards(graph, assignment, k),
                    meta={"method": args.method, "seed": 0,
                          "graph_fingerprint": fingerprint(graph),
                          "num_edges": graph.num_edges})
        load_cal = os.getloadavg()
        cal = with_graph_sparse(calibrate("float32"), graph, "float32")
        # every worker's step timed with all k running at once (one machine's memory and
        # caches shared, as in the run); each alone recorded beside
        measured_compute = shards_step_seconds(shard_dir, settings, args.classes, k,
                                               epochs=args.compute_epochs)
        solo_compute = [shard_step_seconds(load_shard(shard_dir, w), settings,
                                           args.classes, epochs=args.compute_epochs)
                        for w in range(k)]
        result["calibration"] = cal
        result["measured_compute"] = measured_compute
        result["measured_compute_alone"] = solo_compute
        result["load_average_calibration"] = [list(load_cal), list(os.getloadavg())]
        del graph
        speeds = [None] + links
        runs = {g: [] for g in speeds}
        for _ in range(args.repeats):
            for g in speeds:
                link = None if g is None else LinkModel(g, args.latency_us)
                # compute timed just before and just after the run (the k workers at
                # once): this machine's speed drifts from minute to minute (other
                # tenants), so each run is forecast from the compute measured beside it
                before = shards_step_seconds(shard_dir, settings, args.classes, k,
                                             epochs=args.compute_epochs)
                run = _measure(shard_dir, settings, link, warmup=2)
                after = shards_step_seconds(shard_dir, settings, args.classes, k,
                                            epochs=args.compute_epochs)
                run["compute_beside"] = [
                    {"step_cpu_s": (b["step_cpu_s"] + a["step_cpu_s"]) / 2,
                     "eval_cpu_s": (b["eval_cpu_s"] + a["eval_cpu_s"]) / 2,
                     "before": b["step_cpu_s"], "after": a["step_cpu_s"]}
                    for b, a in zip(before, after)]
                runs[g].append(run)
                print(g, {key: v for key, v in run.items() if key != "compute_beside"},
                      file=sys.stderr)
    rows = []
    for g in speeds:
        gbps, lat = (1e6, 0.0) if g is None else (g, args.latency_us)
        common = dict(link_gbps=gbps, latency_us=lat, calibration=cal, cores=k,
                      local_pipes=True, dropout=settings.dropout, classes=args.classes)
        for run in runs[g]:
            fc = forecast_plan(plan, model, measured_compute=run["compute_beside"], **common)
            run["forecast_epoch_s"] = fc["epoch_s"]
            run["ratio_forecast_over_measured"] = fc["epoch_s"] / run["median_epoch_s"]
        # the headline run is the quietest one (fewest cores busy with other work), not
        # the one that agrees best
        best = min(runs[g], key=lambda r: (r["other_busy_cores"] is None,
                                           r["other_busy_cores"] or 0.0))
        fc = forecast_plan(plan, model, measured_compute=best["compute_beside"], **common)
        once = forecast_plan(plan, model, measured_compute=measured_compute, **common)
        counted = forecast_plan(plan, model, **common)
        alone = forecast_plan(plan, model, measured_compute=solo_compute, **common)
        link_only = forecast_plan(plan, model, measured_compute=[
            {"step_cpu_s": 1e-12, "eval_cpu_s": 1e-12}] * k, **common)
        # the sharing of the cores modelled explicitly: the share of a core each worker
        # really got while computing in that run (other people's processes)
        shared = forecast_plan(plan, model, measured_compute=best["compute_beside"],
                               **dict(common, cores=k * best["cpu_share_per_worker"]))
        measured = best["median_epoch_s"]
        row = {"link_gbps": g, "latency_us": lat, "measured_epoch_s": measured,
               "measured": best, "all_runs": runs[g],
               "forecast_epoch_s": fc["epoch_s"], "forecast_compute_s": fc["compute_s"],
               "forecast_exchange_s": fc["exchange_s"], "forecast_allreduce_s":
                   fc["allreduce_s"], "forecast_wait_s": fc["max_wait_s"],
               "ratio_forecast_over_measured": fc["epoch_s"] / measured,
               "forecast_link_only_s": link_only["epoch_s"],
               "link_only_below_measured": link_only["epoch_s"] <= measured,
               "forecast_compute_timed_once_s": once["epoch_s"],
               "ratio_compute_timed_once": once["epoch_s"] / measured,
               "forecast_counted_epoch_s": counted["epoch_s"],
               "ratio_counted_over_measured": counted["epoch_s"] / measured,
               "forecast_compute_alone_epoch_s": alone["epoch_s"],
               "ratio_compute_alone_over_measured": alone["epoch_s"] / measured,
               "forecast_with_core_share_s": shared["epoch_s"],
               "ratio_with_core_share": shared["epoch_s"] / measured}
        if g is not None:
            row["within_15_percent"] = abs(row["ratio_forecast_over_measured"] - 1) <= 0.15
            row["all_runs_within_15_percent"] = all(
                abs(r["ratio_forecast_over_measured"] - 1) <= 0.15 for r in runs[g])
        # the 1-minute load includes this benchmark's own 2 workers (up to ~2): the busy
        # cores of others during the run say more; trust a run when they stayed below 0.5
        row["trusted_load"] = (best["other_busy_cores"] is not None
                               and best["other_busy_cores"] < 0.5)
        rows.append(row)
    result["rows"] = rows
    result["goal"] = "forecast within 15% of measured at every emulated link speed"
    result["goal_met"] = all(r.get("within_15_percent", True) for r in rows)
    result["bench_s"] = time.perf_counter() - t0
    write_json_atomic(args.out, result)
    for r in rows:
        print(f"link {r['link_gbps']!s:>5} Gbit/s  measured {r['measured_epoch_s']:.4f} s  "
              f"forecast {r['forecast_epoch_s']:.4f} s  ratio "
              f"{r['ratio_forecast_over_measured']:.3f}  (timed once "
              f"{r['ratio_compute_timed_once']:.3f}, counted only "
              f"{r['ratio_counted_over_measured']:.3f})  load "
              f"{r['measured']['load_average_before'][0]:.2f}, other busy cores "
              f"{r['measured']['other_busy_cores']}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
