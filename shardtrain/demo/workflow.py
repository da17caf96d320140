"""The demo: the whole workflow on the invented parcel-delivery network, in one call.

1. synthesize the network (`synth.parcel_network`) and write it as an .npz bundle, then
   read it back through `io.load_graph`, so the demo trains on exactly the file it leaves;
2. survey every method x worker count (`survey.survey`), in float64, the dtype it trains in;
3. pick the plan with the least predicted payload per training epoch at the chosen worker
   count, build its shards, train partitioned (one process per shard) and, at the same
   time, single-process (`reference.train_reference`) with the same settings and seed
   (the reference in a thread of this process, whose main thread only waits for the
   workers), and check that every
   epoch's loss and the final weights agree to a relative 1e-9 and that the measured payload
   equals the survey's prediction byte for byte;
4. forecast two link speeds for every surveyed plan with this machine's calibration;
5. grow the network for four weeks (`growth`): each week's delta applied to the shards with
   `update`, the drift against a fresh partition, then a warm restart of training on the
   last week's shards from the checkpoint of step 3;
6. draw the pictures (into plots/) and write the self-contained HTML report around them.

Modules: `settings` (DemoSettings, file names, the output-folder check), `choice` (which
plan it trains and why), `check` (the equality and payload check), `page` (its part of
the HTML report), `background` (the reference's thread), `growth` (the growing network);
this module runs the steps. The
two calls that start training runs are marked "TRAINING RUN" below.

Everything goes into a temporary sibling of the output folder, which is renamed into place
only when all six steps succeeded (`files.atomic_directory`): a failed or interrupted demo
leaves nothing behind. Nothing here prints: progress goes to `on_step(text)`, and
`run_demo` returns a `DemoResult` for the command line to summarise.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from shardtrain.demo.background import Background
from shardtrain.demo.check import check_failure, compare_runs
from shardtrain.demo.choice import build_choice_shards, choice_forecasts, pick
from shardtrain.demo.page import accuracy_text, summary_facts, write_demo_report
from shardtrain.demo.settings import (
    CHECKPOINT_DIR,
    FORECAST_FILE,
    GRAPH_FILE,
    GROWTH_WEEKS,
    PLOT_DIR,
    REPORT_FILE,
    RUN_FILE,
    SHARD_DIR,
    SUMMARY_FILE,
    SURVEY_FILE,
    TIMEOUT_S,
    DemoSettings,
)
from shardtrain.errors import RunError

__all__ = ["DemoResult", "DemoSettings", "chance_levels", "run_demo", "synthesize"]


@dataclass
class DemoResult:
    """What happened, for the command line's summary (paths are final, after the rename)."""

    out_dir: Path
    report: Path
    files: list[str]
    graph: dict                 # vertices, edges, classes, features
    choice: dict                # the plan trained (`choice.pick`): method, workers, ...
    final: dict                 # last epoch record of the partitioned run
    chance: dict                # majority-role share of the test depots, 1 / classes
    check: dict                 # the equality and payload check (see `compare_runs`)
    forecast: list[dict]        # the chosen plan at each link speed
    fastest: dict | None        # the fastest surveyed plan over all link speeds
    settings_doc: dict = field(default_factory=dict)  # the training settings used
    growth: dict = field(default_factory=dict)      # `growth.run_growth`: weekly updates
    seconds: dict = field(default_factory=dict)     # wall seconds per step
    total_s: float = 0.0


# ---------------------------------------------------------------- step 1: the network

def synthesize(settings: DemoSettings, path: Path):
    """Write the parcel network bundle (the layout `shardtrain synth` writes) and load it back."""
    from shardtrain.data.readers import load_graph
    from shardtrain.data.synth import edge_array, parcel_network
    from shardtrain.files import save_npz_atomic

    g = parcel_network(settings.vertices, settings.avg_degree, settings.classes,
                       settings.features, settings.seed)
    save_npz_atomic(path, edges=edge_array(g), num_vertices=g.num_vertices, features=g.features,
                    labels=g.labels, train_mask=g.train_mask, val_mask=g.val_mask,
                    test_mask=g.test_mask)
    return load_graph(path, seed=settings.seed)


def chance_levels(graph) -> dict:
    """Accuracy of guessing: the majority role among the test depots, and 1 / classes."""
    labels = graph.labels[graph.test_mask] if graph.test_mask is not None else graph.labels
    labels = labels[labels >= 0]
    counts = np.bincount(labels, minlength=graph.num_classes) if labels.size else np.zeros(1)
    return {"majority": float(counts.max() / max(counts.sum(), 1)),
            "uniform": 1.0 / max(graph.num_classes, 1)}


# ---------------------------------------------------------------- the demo

def train_reference_pinned(graph, settings):    # TRAINING RUN: the reference
    """The reference with BLAS on one thread, like every worker (fewer busy threads)."""
    from threadpoolctl import threadpool_limits

    from shardtrain.train.api import RunConfig, run

    with threadpool_limits(limits=1):       # in a thread: no signal handlers of its own
        outcome = run(RunConfig(source=GRAPH_FILE, graph=graph, mode="reference",
                                settings=settings), signals=False)
    assert outcome is not None               # pipes and reference runs always return one
    return outcome.result


class _Clock:
    def __init__(self):
        self.start = time.perf_counter()
        self.seconds: dict[str, float] = {}

    def step(self, name: str, since: float) -> float:
        now = time.perf_counter()
        self.seconds[name] = now - since
        return now


def run_demo(settings: DemoSettings, on_step: Callable[[str], None] | None = None
             ) -> DemoResult:
    """Run the six steps into `settings.out` (see the module docstring); parent folders
    it creates are removed again when it fails."""
    settings = settings.validate()
    say = on_step or (lambda text: None)
    out = Path(settings.out)
    created = [a for a in out.absolute().parents if not a.exists()]   # deepest first
    out.absolute().parent.mkdir(parents=True, exist_ok=True)
    try:
        return _run_into(settings, out, say)
    except BaseException:
        for folder in created:       # a failed demo leaves no folder it made either
            try:
                folder.rmdir()
            except OSError:
                break
        raise


def _run_into(settings: DemoSettings, out: Path, say) -> DemoResult:
    from shardtrain.files import atomic_directory, write_json_atomic

    clock = _Clock()
    with atomic_directory(out, overwrite=True) as tmp:   # check_out_dir guarded overwrite
        result = _run_steps(settings, tmp, say, clock)
        result.total_s = time.perf_counter() - clock.start
        result.seconds = dict(clock.seconds)
        facts = summary_facts(result, result.settings_doc)
        t = time.perf_counter()
        say("[6/6] drawing the pictures and writing the HTML report")
        write_demo_report(tmp, tmp / REPORT_FILE, facts, tmp / PLOT_DIR,
                          choice=result.choice, growth=result.growth)
        clock.step("report", t)
        result.seconds = dict(clock.seconds)
        result.total_s = time.perf_counter() - clock.start
        write_json_atomic(tmp / SUMMARY_FILE, _summary_doc(result, settings))
        result.files = sorted(str(p.relative_to(tmp)) for p in tmp.rglob("*") if p.is_file())
    result.out_dir = out
    result.report = out / REPORT_FILE
    return result


def _summary_doc(r: DemoResult, settings: DemoSettings) -> dict:
    """demo.json: what the demo did, in short (the report reads survey/run/forecast)."""
    return {"demo": {"vertices": settings.vertices, "workers": settings.workers,
                     "epochs": settings.epochs, "seed": settings.seed,
                     "methods": list(settings.methods),
                     "survey_workers": settings.surveyed_workers,
                     "links_gbps": list(settings.links_gbps), "latency_us": settings.latency_us},
            "graph": r.graph, "plan": r.choice, "final": r.final, "chance": r.chance,
            "check": {k: v for k, v in r.check.items() if k != "weight_rel_diff"},
            "forecast": r.forecast, "fastest": r.fastest,
            "growth": {k: v for k, v in r.growth.items() if k != "plot"},
            "seconds": r.seconds,
            "total_s": r.total_s}


def _run_steps(settings: DemoSettings, tmp: Path, say, clock: _Clock) -> DemoResult:
    from shardtrain.files import write_json_atomic
    from shardtrain.forecast.calibrate import calibrate, with_graph_sparse
    from shardtrain.forecast.projection import forecast
    from shardtrain.plan.survey import SurveySettings, survey
    from shardtrain.train.api import RunConfig
    from shardtrain.train.api import run as train
    from shardtrain.train.rundoc import graph_of_file, run_document
    from shardtrain.train.settings import TrainSettings

    (tmp / PLOT_DIR).mkdir()

    # 1. the network
    t = time.perf_counter()
    say(f"[1/6] synthesizing the parcel network: {settings.vertices:,} depots, "
        f"{settings.classes} roles (seed {settings.seed})")
    loaded = synthesize(settings, tmp / GRAPH_FILE)
    graph = loaded.graph
    graph_facts = {"vertices": graph.num_vertices, "edges": graph.num_edges,
                   "classes": graph.num_classes, "features": graph.input_dim}
    say(f"      {graph.num_vertices:,} depots, {graph.num_edges:,} routes -> {GRAPH_FILE}")
    t = clock.step("synth", t)

    # 2. the survey, in the dtype the demo trains in, so its bytes are the run's
    train_settings = TrainSettings(epochs=settings.epochs, seed=settings.seed,
                                   dtype="float64").validate()
    survey_settings = SurveySettings(layers=train_settings.layers, hidden=train_settings.hidden,
                                     dtype=train_settings.dtype, bias=train_settings.bias,
                                     seed=settings.seed)
    workers_list = settings.surveyed_workers
    say(f"[2/6] surveying {len(settings.methods)} methods x workers "
        f"{','.join(map(str, workers_list))}")
    survey_dict = survey(graph, list(settings.methods), workers_list, survey_settings)
    survey_dict["graph"]["source"] = GRAPH_FILE
    write_json_atomic(tmp / SURVEY_FILE, survey_dict)
    t = clock.step("survey", t)

    # 3. the best plan, trained partitioned and single-process
    choice = pick(survey_dict, settings.workers)
    survey_plan = next(p for p in survey_dict["plans"]
                       if p["method"] == choice["method"] and p["workers"] == choice["workers"])
    say(f"[3/6] best plan for {choice['workers']} workers: {choice['method']} "
        f"({choice['reason']})")
    build_choice_shards(graph, choice, settings, tmp / SHARD_DIR)
    say(f"      training {settings.epochs} epochs on {choice['workers']} worker processes and, "
        f"alongside, in one process (float64; {choice['workers'] + 1} busy processes, BLAS on "
        f"one thread each, on {os.cpu_count()} cores)")
    report_every = max(1, settings.epochs // 4)

    def progress(rec):
        if rec["epoch"] % report_every == 0 or rec["epoch"] == settings.epochs:
            say(f"      epoch {rec['epoch']}/{settings.epochs}: loss {rec['loss']:.4f}, "
                f"test accuracy {accuracy_text(rec['test_acc'])}")

    # TRAINING RUN: the reference in a thread, the partitioned run here
    reference = Background(train_reference_pinned, graph, train_settings)
    outcome = train(RunConfig(source=str(tmp / SHARD_DIR), settings=train_settings,
                              timeout_s=TIMEOUT_S, checkpoint=str(tmp / CHECKPOINT_DIR),
                              checkpoint_every=settings.epochs),
                    on_epoch=progress, signals=False)
    assert outcome is not None               # pipes runs always return one
    run = outcome.result
    ref = reference.result()
    check = compare_runs(run, ref, survey_plan, settings.epochs)
    failure = check_failure(check)
    if failure:
        raise RunError(failure)
    say(f"      equal to the reference: max relative difference {check['max_rel_diff']:.2e}; "
        f"payload measured == predicted: {check['measured_payload_bytes']:,} bytes")
    run_doc = run_document(train_settings, graph_of_file(GRAPH_FILE, graph, loaded.notes),
                           run, mode="partitioned", plan=choice, check=check)
    write_json_atomic(tmp / RUN_FILE, run_doc)
    t = clock.step("train", t)

    # 4. the forecast, from this machine's kernels timed once (sparse on the graph's own Â)
    say(f"[4/6] forecasting links of {' and '.join(f'{g:g}' for g in settings.links_gbps)} "
        f"Gbit/s (timing this machine's kernels first)")
    calibration = with_graph_sparse(calibrate(train_settings.dtype, roofline=False), graph,
                                    train_settings.dtype)
    forecast_dict = forecast(survey_dict, link_gbps_list=list(settings.links_gbps),
                             latency_us=settings.latency_us, calibration=calibration,
                             dropout=train_settings.dropout)
    forecast_dict["source"] = SURVEY_FILE
    write_json_atomic(tmp / FORECAST_FILE, forecast_dict)
    t = clock.step("forecast", t)

    # 5. the network grows: four weekly updates, their drift, a warm restart
    from shardtrain.demo.growth import run_growth

    say(f"[5/6] growing the network: {GROWTH_WEEKS} weekly updates of the plan, then a "
        f"warm restart")
    growth = run_growth(tmp, graph, tmp / SHARD_DIR, tmp / CHECKPOINT_DIR, train_settings,
                        survey_settings, tmp / PLOT_DIR, say)
    clock.step("growth", t)

    return DemoResult(out_dir=tmp, report=tmp / REPORT_FILE, files=[], graph=graph_facts,
                      choice=choice, final=dict(run.epochs[-1]),
                      chance=chance_levels(graph), check=check,
                      forecast=choice_forecasts(forecast_dict, choice),
                      fastest=forecast_dict.get("fastest"),
                      settings_doc=train_settings.to_dict(), growth=growth)
