"""Forecast the epoch time of partition plans on a described cluster (link speed, latency, CPUs).

GRAPH_OR_JSON is a graph (surveyed first, as `shardtrain survey` would) or a survey JSON
(used as is; --workers/--method then pick plans from it). Compute is forecast from this
machine's kernels, timed once (a few seconds; --calibration FILE keeps the timing), scaled
by --speed-factor for the target CPUs, or from --flops-per-worker. Given a GRAPH, the
sparse products are timed on the graph's own adjacency. Each link speed in
--link-gbps (Gbit/s per worker; default the presets 1,10,25,100) is forecast for every plan.
The table marks the fastest plan and the plan with the fewest workers meeting
--target-epoch-s.

With --worker-spec FILE (TOML or JSON: the machines you could buy, figures off their
datasheets; see examples/worker-specs.toml) every plan is forecast on every worker the file
describes: compute on the worker's roofline (calibrated on this machine), its network and
latency, its memory (plans that do not fit are marked and never chosen) and its price. With
--target-epoch-s it names, per worker kind, the fewest workers meeting the target with their
price per epoch and per 100 epochs, and overall the cheapest plan meeting it.
"""
from __future__ import annotations

import math
import sys
from pathlib import Path

from shardtrain import defaults
from shardtrain.cli.common import (
    add_graph_arguments,
    add_plan_shape_arguments,
    add_scheme_arguments,
    load_graph_from_args,
    parse_int_list,
    parse_name_list,
    scheme_settings,
)
from shardtrain.errors import InputError
from shardtrain.report.tables import format_table
from shardtrain.units import human_seconds

DEFAULT_LINKS = defaults.listed(defaults.LINK_PRESETS_GBPS)
DEFAULT_WORKERS = defaults.listed(defaults.FORECAST_WORKERS)
DEFAULT_METHODS = defaults.listed(defaults.COMPARED_METHODS)


def add_arguments(parser) -> None:
    add_graph_arguments(parser)
    add = parser.add_argument

    add("--workers", default=None, metavar="K,K,...",
        help=f"worker counts (default {DEFAULT_WORKERS}; with a survey JSON: all of its plans)")
    add("--method", default=None, metavar="M,M,...",
        help=f"partition methods (default {DEFAULT_METHODS}; with a survey JSON: all)")
    add("--link-gbps", default=DEFAULT_LINKS, metavar="G,G,...",
        help=f"link speeds per worker in Gbit/s (default the presets {DEFAULT_LINKS})")
    add("--latency-us", type=float, default=defaults.LATENCY_US, metavar="US",
        help=f"one-way latency of a link call in microseconds (default {defaults.LATENCY_US:g})")
    add("--flops-per-worker", type=float, default=None, metavar="F",
        help="dense flop/s of one target worker core, instead of timing this machine")
    add("--calibration", default=None, metavar="FILE.json",
        help="read this machine's kernel timing from FILE, or time it and write it there")
    add("--speed-factor", type=float, default=defaults.SPEED_FACTOR, metavar="X",
        help=f"target CPU speed relative to this machine's calibrated core "
             f"(default {defaults.SPEED_FACTOR:g})")
    add("--target-epoch-s", type=float, default=None, metavar="T",
        help="mark the plan with the fewest workers whose epoch takes at most T seconds")
    add("--measure-compute", action="store_true",
        help="time each plan's training step on its own shards with the worker's code, "
             "one shard at a time (a few epochs per plan; GRAPH input only)")
    add("--cores", type=int, default=None, metavar="C",
        help="forecast for C cores on ONE machine: more workers than cores share them")
    add("--dropout", type=float, default=defaults.DROPOUT,
        help=f"dropout rate of training (default {defaults.DROPOUT:g})")
    add_plan_shape_arguments(parser)
    add_scheme_arguments(parser)
    add("--worker-spec", default=None, metavar="FILE",
        help="forecast on the workers described in FILE (.toml [[worker]] tables, or a "
             "JSON list): replaces --link-gbps, --latency-us, --speed-factor and "
             "--flops-per-worker")
    add("--json", default=None, metavar="OUT.json", help="write the forecast as JSON")
    add("--plot", default=None, metavar="DIR", help="write PNG pictures of the forecast to DIR")


def parse_float_list(text: str, option: str) -> list[float]:
    values = []
    for part in (text or "").split(","):
        part = part.strip()
        try:
            v = float(part)
        except ValueError:
            raise InputError(f"{option}: {part!r} is not a number") from None
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"{option}: {part!r} must be a positive number")
        values.append(v)
    if not values:
        raise InputError(f"{option}: give at least one value")
    return values


def _survey_and_measure(graph, methods, workers, settings, dropout, cores=None):
    """Survey plan by plan and time every plan's shards on the worker's own code (with
    `cores`, as many shards at once as a local run on that many cores computes at once)."""
    import os

    from shardtrain.forecast.calibrate import plan_step_seconds
    from shardtrain.plan.partition import partition
    from shardtrain.plan.survey import survey
    from shardtrain.train.settings import TrainSettings

    if graph.features is None or graph.labels is None:
        raise InputError("--measure-compute: the graph needs features and labels to train")
    train = TrainSettings(layers=settings.layers, hidden=settings.hidden, dropout=dropout,
                          dtype=settings.dtype, bias=settings.bias, seed=settings.seed,
                          model=settings.model, heads=settings.heads)
    head, plans, measured = None, [], {}
    for method in methods:
        for k in workers:
            a = partition(graph, method, k, seed=settings.seed, imbalance=settings.imbalance)
            head = survey(graph, [method], [k], settings, assignment=a)
            plans += head["plans"]
            print(f"timing the training step of {method} x {k} on its shards ...",
                  file=sys.stderr)
            together = min(k, cores, os.cpu_count() or 1) if cores else 1
            measured[(method, k)] = plan_step_seconds(graph, a, k, train,
                                                      head["graph"]["classes"],
                                                      together=together)
    assert head is not None          # methods and workers are non-empty lists
    return dict(head, plans=plans), measured


def _check_options(args) -> None:
    """Every option check that needs no file, before any work."""
    _check_positive_opt(args.latency_us, "--latency-us", allow_zero=True)
    _check_positive_opt(args.speed_factor, "--speed-factor")
    if args.target_epoch_s is not None:
        _check_positive_opt(args.target_epoch_s, "--target-epoch-s")
    if args.flops_per_worker is not None:
        _check_positive_opt(args.flops_per_worker, "--flops-per-worker")
        if args.calibration:
            raise InputError("--flops-per-worker: give it or --calibration, not both")
    if args.worker_spec is not None:
        for value, default, option in ((args.link_gbps, DEFAULT_LINKS, "--link-gbps"),
                                       (args.latency_us, defaults.LATENCY_US, "--latency-us"),
                                       (args.speed_factor, defaults.SPEED_FACTOR,
                                        "--speed-factor"),
                                       (args.flops_per_worker, None, "--flops-per-worker"),
                                       (args.cores, None, "--cores")):
            if value != default:
                raise InputError(f"{option}: the worker spec describes each worker; leave "
                                 f"{option} out with --worker-spec")
        if args.measure_compute:
            raise InputError("--measure-compute: compute on a described worker is its "
                             "roofline; leave --measure-compute out with --worker-spec")
    if args.cores is not None and args.cores < 1:
        raise InputError(f"--cores: must be >= 1, got {args.cores}")
    if not 0.0 <= args.dropout < 1.0:
        raise InputError(f"--dropout: must be in [0, 1), got {args.dropout}")
    if args.dtype not in ("float32", "float64"):
        raise InputError(f"--dtype: must be float32 or float64, got {args.dtype!r}")
    for path, option in ((args.json, "--json"),):
        if path is not None and not Path(path).parent.is_dir():
            raise InputError(f"{option}: folder {Path(path).parent} does not exist")
    if args.plot is not None and Path(args.plot).exists() and not Path(args.plot).is_dir():
        raise InputError(f"--plot: {args.plot} exists and is not a folder")
    if args.calibration and Path(args.calibration).exists() is False \
            and not Path(args.calibration).parent.is_dir():
        raise InputError(f"--calibration: folder {Path(args.calibration).parent} does not exist")
    from shardtrain.files import check_paths

    # an existing --calibration is read (an input); a missing one is written (an output)
    cal = args.calibration if args.flops_per_worker is None else None
    cal_exists = cal is not None and Path(cal).exists() and not Path(cal).is_dir()
    check_paths(inputs={"GRAPH": args.graph, "--features": args.features,
                        "--labels": args.labels, "--worker-spec": args.worker_spec,
                        "--calibration": cal if cal_exists else None},
                outputs={"--json": args.json,
                         "--calibration": None if cal_exists or (cal and Path(cal).is_dir())
                         else cal},
                out_dirs={"--plot": args.plot})


def _check_positive_opt(value, option, allow_zero=False) -> None:
    if value is None or not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
        raise InputError(f"{option}: must be a {'non-negative' if allow_zero else 'positive'}"
                         f" number, got {value}")


def read_survey_json(path: str) -> dict:
    """A survey JSON written by `shardtrain survey --json`, checked against its shape
    (`documents.SURVEY`: plans, shards, traffic, model dtype and hops); InputError naming
    the file and the key."""
    from shardtrain import documents
    from shardtrain.report.html import document_kind

    data = documents.parse_json_file(path, max_bytes=documents.MAX_BYTES["survey"])
    kind = document_kind(data)
    if kind in ("run", "forecast"):
        raise InputError(f"{path}:1: this is a {kind} JSON; give a survey JSON "
                         f"(`shardtrain survey GRAPH --json OUT.json`) or the graph itself")
    if not isinstance(data, dict) or "plans" not in data or "model" not in data:
        raise InputError(f"{path}:1: not a survey JSON (needs 'model' and 'plans'; "
                         f"write one with `shardtrain survey GRAPH --json OUT.json`)")
    return documents.validate(data, "survey", path)


def _select(survey: dict, workers, methods, source: str) -> dict:
    plans = [p for p in survey["plans"]
             if (workers is None or p["workers"] in workers)
             and (methods is None or p["method"] in methods)]
    if not plans:
        raise InputError(f"--workers/--method: no plan of {source} matches")
    return dict(survey, plans=plans)


TABLE_COLUMNS = [
    ("method", "method", None), ("workers", "workers", "{:,}"),
    ("link", "link", None),
    ("epoch_s", "epoch", human_seconds), ("compute_s", "compute", human_seconds),
    ("exchange_s", "exchange", human_seconds), ("allreduce_s", "all-reduce", human_seconds),
    ("wait_s", "wait (mean)", human_seconds), ("eval_s", "+eval", human_seconds),
    ("bottleneck", "bound by", None), ("mark", "", None),
]


BOUND_NAMES = {"compute": "compute", "exchange": "halo exchange", "allreduce": "all-reduce"}


def _link_name(gbps: float) -> str:
    return f"{gbps:g} Gbit/s"


def table_rows(result: dict) -> list[dict]:
    rows = []
    for p in result["plans"]:
        marks = []
        if p.get("fastest"):
            marks.append("<- fastest")
        if p.get("fewest_meeting_target"):
            marks.append("<- fewest workers meeting target")
        rows.append(dict(p, link=_link_name(p["link_gbps"]), mark="; ".join(marks),
                         bottleneck=BOUND_NAMES.get(p["bottleneck"], p["bottleneck"])))
    return rows


def summary_lines(result: dict) -> list[str]:
    out = []
    if (result.get("model", {}).get("halo_scheme") or {}).get("halo_stale"):
        out.append("stale halos: each worker's epoch is the larger of its compute and its "
                   "halo exchanges (which overlap), plus the all-reduce; epoch 1 (the "
                   "synchronous warm-up) costs the plan's 'stale.synchronous_epoch_s'")
    f = result["fastest"]
    if f:
        out.append(f"fastest: {f['method']} on {f['workers']} workers at "
                   f"{_link_name(f['link_gbps'])}, {human_seconds(f['epoch_s'])} per epoch")
    t = result.get("target_epoch_s")
    if t is not None:
        m = result["fewest_meeting_target"]
        if m:
            out.append(f"fewest workers meeting {human_seconds(t)}: {m['method']} on {m['workers']}"
                       f" workers at {_link_name(m['link_gbps'])} ({human_seconds(m['epoch_s'])})")
        else:
            out.append(f"no plan meets the target of {human_seconds(t)} per epoch")
    return out


SPEC_COLUMNS = [
    ("spec", "worker", None), ("method", "method", None), ("workers", "workers", "{:,}"),
    ("epoch_s", "epoch", human_seconds), ("compute_s", "compute", human_seconds),
    ("exchange_s", "exchange", human_seconds), ("allreduce_s", "all-reduce", human_seconds),
    ("memory", "memory/worker", None), ("price", "price/epoch", None),
    ("price_100", "per 100 epochs", None), ("bottleneck", "bound by", None),
    ("mark", "", None),
]


def _money(v) -> str:
    return "-" if v is None else f"{v:.4g}"


def spec_table_rows(result: dict) -> list[dict]:
    from shardtrain.units import human_bytes

    rows = []
    for p in result["plans"]:
        marks = []
        if p.get("fits_memory") is False:
            marks.append("does not fit in memory")
        if p.get("fastest"):
            marks.append("<- fastest")
        if p.get("fewest_meeting_target"):
            marks.append("<- fewest meeting target")
        if p.get("cheapest_meeting_target"):
            marks.append("<- cheapest meeting target")
        mem = p.get("memory_bytes")
        rows.append(dict(p, mark="; ".join(marks),
                         memory="-" if mem is None else
                         f"{human_bytes(mem)} of {human_bytes(p['memory_limit_bytes'])}",
                         price=_money(p.get("price_per_epoch")),
                         price_100=_money(p.get("price_per_100_epochs")),
                         bottleneck=BOUND_NAMES.get(p["bottleneck"], p["bottleneck"])))
    return rows


def spec_summary_lines(result: dict) -> list[str]:
    out = []
    t = result.get("target_epoch_s")
    for s in result["per_spec"]:
        if s["plans_fitting_memory"] == 0:
            out.append(f"{s['spec']}: no plan fits in its memory")
            continue
        if t is None:
            f = s["fastest"]
            out.append(f"{s['spec']}: fastest {f['method']} on {f['workers']} workers, "
                       f"{human_seconds(f['epoch_s'])} per epoch")
            continue
        m = s["fewest_meeting_target"]
        if m is None:
            out.append(f"{s['spec']}: no plan meets {human_seconds(t)} per epoch")
        else:
            price = "" if m["price_per_epoch"] is None else \
                (f", {_money(m['price_per_epoch'])} per epoch, "
                 f"{_money(m['price_per_100_epochs'])} per 100 epochs")
            out.append(f"{s['spec']}: fewest workers meeting {human_seconds(t)}: "
                       f"{m['workers']} ({m['method']}, {human_seconds(m['epoch_s'])}"
                       f"{price})")
    if t is not None:
        c = result.get("cheapest_meeting_target")
        if c is not None:
            out.append(f"cheapest meeting {human_seconds(t)}: {c['workers']} x {c['spec']} "
                       f"({c['method']}), {_money(c['price_per_epoch'])} per epoch, "
                       f"{_money(c['price_per_100_epochs'])} per 100 epochs")
        elif any(s["fewest_meeting_target"] for s in result["per_spec"]):
            out.append("cheapest meeting the target: no price given (price_per_hour)")
    return out


def run(args) -> int:
    from shardtrain.forecast.calibrate import from_flops, load_or_calibrate
    from shardtrain.forecast.projection import forecast

    links = parse_float_list(args.link_gbps, "--link-gbps")
    workers = parse_int_list(args.workers, "--workers") if args.workers is not None else None
    methods = parse_name_list(args.method, "--method") if args.method is not None else None
    _check_options(args)
    specs = None
    if args.worker_spec is not None:                 # a bad spec file costs no work
        from shardtrain.forecast.specs import read_specs

        specs = read_specs(args.worker_spec)
    source = str(args.graph)
    graph, measured = None, None
    is_survey = source.lower().endswith(".json")
    if is_survey:
        if args.measure_compute:
            raise InputError("--measure-compute: needs the graph (its shards are trained), "
                             f"not a survey JSON ({source})")
        if (args.halo_keep, args.halo_format, args.halo_stale, args.halo_smooth) != (
                defaults.HALO_KEEP, defaults.HALO_FORMAT, defaults.HALO_STALE,
                defaults.HALO_SMOOTH):
            raise InputError(f"--halo-keep/--halo-format/--halo-stale: {source} is a survey, "
                             f"which carries "
                             f"its own halo scheme (give them to `survey`)")
        survey_dict = _select(read_survey_json(source), workers, methods, source)
    cached = None
    if args.flops_per_worker is None and args.calibration:   # a bad file costs no work
        from shardtrain.forecast.calibrate import read_calibration

        cached = read_calibration(args.calibration, survey_dict["model"].get(
            "dtype", "float32") if is_survey else args.dtype)
    if not is_survey:
        from shardtrain.plan.survey import SurveySettings, check_plans, survey

        settings = SurveySettings(layers=args.layers, hidden=args.hidden, dtype=args.dtype,
                                  classes=args.classes, input_dim=args.input_dim,
                                  bias=args.bias, imbalance=args.imbalance, seed=args.seed,
                                  model=args.model, heads=args.heads,
                                  epochs=1, **scheme_settings(args))
        workers = workers or parse_int_list(DEFAULT_WORKERS, "--workers")
        methods = methods or parse_name_list(DEFAULT_METHODS, "--method")
        loaded = load_graph_from_args(args)
        check_plans(loaded.graph, methods, workers, settings)
        print(f"surveying {len(methods)} methods x {len(workers)} worker counts ...",
              file=sys.stderr)
        graph = loaded.graph
        if args.measure_compute:
            survey_dict, measured = _survey_and_measure(graph, methods, workers, settings,
                                                        args.dropout, args.cores)
        else:
            survey_dict = survey(graph, methods, workers, settings)
    dtype = survey_dict["model"].get("dtype", "float32")
    if args.flops_per_worker is not None:
        calibration = from_flops(args.flops_per_worker, dtype)
    else:
        if cached is not None and cached["dtype"] == dtype:
            calibration = cached
        else:
            print("timing this machine's kernels (one thread) ...", file=sys.stderr)
            calibration = load_or_calibrate(args.calibration, dtype)
        if graph is not None:   # sparse speeds on the graph's own structure
            from shardtrain.forecast.calibrate import with_graph_sparse

            calibration = with_graph_sparse(calibration, graph, dtype)
    if specs is not None:
        return _run_on_specs(args, survey_dict, specs, calibration, source)
    result = forecast(survey_dict, link_gbps_list=links, latency_us=args.latency_us,
                      calibration=calibration, speed_factor=args.speed_factor,
                      target_epoch_s=args.target_epoch_s, cores=args.cores,
                      dropout=args.dropout, measured_compute=measured)
    result["source"] = source
    g = result["graph"]
    print(f"{g.get('vertices', 0):,} vertices, {g.get('edges', 0):,} edges; latency "
          f"{args.latency_us:g} us; speed factor {args.speed_factor:g}; one training epoch "
          f"(+eval: the evaluation forward, not included in epoch)")
    print(format_table(table_rows(result), TABLE_COLUMNS))
    for line in summary_lines(result):
        print(line)
    return _write_outputs(args, result)


def _write_outputs(args, result: dict) -> int:
    """--json and --plot of a forecast, linked or on worker specs."""
    from shardtrain.files import write_json_atomic

    if args.json:
        write_json_atomic(args.json, result)
    if args.plot:
        from shardtrain.report.plots import forecast_plots

        Path(args.plot).mkdir(parents=True, exist_ok=True)
        forecast_plots(result, args.plot)
    return 0


def _run_on_specs(args, survey_dict: dict, specs, calibration: dict, source: str) -> int:
    from shardtrain.forecast.projection import forecast_on_specs

    result = forecast_on_specs(survey_dict, specs, calibration=calibration,
                               target_epoch_s=args.target_epoch_s, dropout=args.dropout)
    result["source"] = source
    result["worker_spec_file"] = str(args.worker_spec)
    g = result["graph"]
    print(f"{g.get('vertices', 0):,} vertices, {g.get('edges', 0):,} edges; "
          f"{len(specs)} worker kinds from {args.worker_spec}; one training epoch "
          f"(compute on each worker's roofline, its network and latency)")
    print(format_table(spec_table_rows(result), SPEC_COLUMNS))
    for line in spec_summary_lines(result):
        print(line)
    return _write_outputs(args, result)
