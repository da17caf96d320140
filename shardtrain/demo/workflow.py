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
5. draw the pictures (into plots/) and write the self-contained HTML report around them.

Everything goes into a temporary sibling of the output folder, which is renamed into place
only when all five steps succeeded (`files.atomic_directory`): a failed or interrupted demo
leaves nothing behind. Nothing here prints: progress goes to `on_step(text)`, and
`run_demo` returns a `DemoResult` for the command line to summarise.
"""
from __future__ import annotations

import html
import os
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from shardtrain.errors import InputError, RunError
from shardtrain.units import human_seconds

GRAPH_FILE = "parcel-network.npz"
SURVEY_FILE = "survey.json"
RUN_FILE = "run.json"
FORECAST_FILE = "forecast.json"
REPORT_FILE = "report.html"
SUMMARY_FILE = "demo.json"       # also marks a folder as a demo's, for --overwrite
SHARD_DIR = "shards"
PLOT_DIR = "plots"

METHODS = ("metis", "metis-volume", "fennel", "random", "range")
SURVEY_WORKERS = (2, 4, 8)
LINKS_GBPS = (1.0, 10.0)
LATENCY_US = 20.0                # forecast.DEFAULT_LATENCY_US: a switched data-centre LAN
RTOL = 1e-9                      # docs/design.md §1.7: float64 partitioned == reference
MAX_WORKERS = 16                 # more processes than that only slow a 2-core machine down
MIN_VERTICES = 200
TIMEOUT_S = 120.0                # receive deadline; generous because the machine is shared

# Full-size defaults: the demo (synth, survey of 15 plans, 100 epochs on 4 workers plus the
# reference, calibration, forecast, report) takes well under 2 minutes on a busy 2-core
# machine. --quick: tiny sizes for tests.
DEFAULT_VERTICES = 20_000
DEFAULT_EPOCHS = 100
QUICK_VERTICES = 600
QUICK_EPOCHS = 5


@dataclass(frozen=True)
class DemoSettings:
    """What the demo does. The network's shape follows `shardtrain synth`'s defaults; the
    training settings are the GCN paper's (Kipf & Welling 2017; `settings.TrainSettings`)
    except the epoch count and the dtype (float64, so the equality check is to rounding)."""

    out: str = "shardtrain-demo"
    vertices: int = DEFAULT_VERTICES
    workers: int = 4
    epochs: int = DEFAULT_EPOCHS
    seed: int = 0
    overwrite: bool = False
    avg_degree: float = 10.0
    classes: int = 6
    features: int = 32
    methods: tuple = METHODS
    survey_workers: tuple = SURVEY_WORKERS
    links_gbps: tuple = LINKS_GBPS
    latency_us: float = LATENCY_US

    @classmethod
    def quick(cls, **kw) -> "DemoSettings":
        return cls(**{"vertices": QUICK_VERTICES, "epochs": QUICK_EPOCHS, **kw})

    def validate(self) -> "DemoSettings":
        """InputError naming the option of the first bad value; checks the output folder."""
        def need(ok, option, rule, value):
            if not ok:
                raise InputError(f"{option} {value}: must be {rule}")

        need(_is_int(self.vertices) and self.vertices >= MIN_VERTICES, "--vertices",
             f"an integer >= {MIN_VERTICES}", self.vertices)
        need(_is_int(self.workers) and 2 <= self.workers <= min(MAX_WORKERS, self.vertices),
             "--workers", f"an integer from 2 to {MAX_WORKERS} (the demo compares several "
             f"workers with one process)", self.workers)
        need(_is_int(self.epochs) and self.epochs >= 1, "--epochs", "an integer >= 1",
             self.epochs)
        need(_is_int(self.seed) and self.seed >= 0, "--seed", "an integer >= 0", self.seed)
        check_out_dir(self.out, self.overwrite)
        return self

    @property
    def plan_workers(self) -> list[int]:
        """Surveyed worker counts: the standard ones plus the chosen count."""
        return sorted(set(self.survey_workers) | {self.workers})


def _is_int(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


def check_out_dir(out, overwrite: bool) -> None:
    """Refuse, before any work, an output that is a file, a non-empty folder without
    --overwrite, or (with --overwrite) a non-empty folder that is not an earlier demo's."""
    p = Path(out)
    if p.exists() and not p.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    if p.is_dir() and any(p.iterdir()):
        if not overwrite:
            raise InputError(f"--out {out}: folder exists and is not empty "
                             f"(give --overwrite to replace an earlier demo, or another --out)")
        if not (p / SUMMARY_FILE).is_file():
            raise InputError(f"--out {out}: not an earlier demo's folder (no {SUMMARY_FILE}); "
                             f"--overwrite only replaces those")
    parent = p.absolute().parent
    if parent.exists() and not parent.is_dir():
        raise InputError(f"--out {out}: {parent} is not a folder")
    from shardtrain.files import current_folder, is_inside, probe_folder

    if is_inside(current_folder(), p):   # renaming the folder we stand in cannot work
        raise InputError(f"--out {out}: is or holds the current folder, which the demo "
                         f"cannot replace (run it from another folder or give another --out)")
    while not parent.exists():     # the demo creates missing parent folders
        parent = parent.parent
    if not parent.is_dir():
        raise InputError(f"--out {out}: {parent} is not a folder")
    probe_folder(parent, f"--out {out}")


@dataclass
class DemoResult:
    """What happened, for the command line's summary (paths are final, after the rename)."""

    out_dir: Path
    report: Path
    files: list[str]
    graph: dict                 # vertices, edges, classes, features
    plan: dict                  # method, workers, epoch_payload_bytes, reason, ranking
    final: dict                 # last epoch record of the partitioned run
    chance: dict                # majority-role share of the test depots, 1 / classes
    check: dict                 # the equality and payload check (see `compare_runs`)
    forecast: list[dict]        # the chosen plan at each link speed
    fastest: dict | None        # the fastest surveyed plan over all link speeds
    settings_doc: dict = field(default_factory=dict)  # the training settings used
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


# ---------------------------------------------------------------- step 3: choose and check

def choose_plan(survey_dict: dict, workers: int) -> dict:
    """The plan with the least predicted payload per training epoch among those with
    `workers` workers (ties: the order of the survey), and the ranking that explains it."""
    plans = [p for p in survey_dict["plans"] if p["workers"] == workers]
    if not plans:
        raise RunError(f"the survey has no plan for {workers} workers")
    ranked = sorted(plans, key=lambda p: p["epoch_payload_bytes"])   # stable: survey order
    best = ranked[0]
    ranking = [{"method": p["method"], "epoch_payload_bytes": int(p["epoch_payload_bytes"]),
                "edge_cut": int(p["edge_cut"]), "replication_factor": p["replication_factor"]}
               for p in ranked]
    return {"method": best["method"], "workers": workers,
            "epoch_payload_bytes": int(best["epoch_payload_bytes"]),
            "edge_cut": int(best["edge_cut"]),
            "replication_factor": best["replication_factor"],
            "reason": plan_reason(ranking), "ranking": ranking}


def plan_reason(ranking: list[dict]) -> str:
    """One sentence: why the first plan of the ranking was chosen."""
    from shardtrain.units import human_bytes

    best = ranking[0]
    text = (f"least predicted traffic per epoch: {human_bytes(best['epoch_payload_bytes'])} "
            f"(edge cut {best['edge_cut']:,}, replication {best['replication_factor']:.3f})")
    if len(ranking) > 1:
        nxt, worst = ranking[1], ranking[-1]
        text += f"; next {nxt['method']} {human_bytes(nxt['epoch_payload_bytes'])}"
        if worst is not nxt:
            text += f", most {worst['method']} {human_bytes(worst['epoch_payload_bytes'])}"
        if best["epoch_payload_bytes"]:
            text += f" ({worst['epoch_payload_bytes'] / best['epoch_payload_bytes']:.1f}x)"
        fewest_cut = min(ranking, key=lambda p: p["edge_cut"])
        if fewest_cut["edge_cut"] < best["edge_cut"]:
            # traffic follows the halo rows (communication volume), not the cut edges
            text += (f"; {fewest_cut['method']} cuts fewer routes ({fewest_cut['edge_cut']:,}) "
                     f"but sends more halo rows")
    return text


def build_plan_shards(graph, plan: dict, settings: DemoSettings, shard_dir: Path) -> None:
    """Partition as the survey did (same method, seed and imbalance) and save the shards."""
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.partition import partition_plan
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.plan.survey import SurveySettings

    imbalance = SurveySettings().imbalance
    k = plan["workers"]
    assignment, details = partition_plan(graph, plan["method"], k, seed=settings.seed,
                                         imbalance=imbalance)
    shards = build_shards(graph, assignment, k)
    save_shards(shard_dir, shards, meta={"num_classes": graph.num_classes,
                                         "input_dim": graph.input_dim,
                                         "method": plan["method"], "seed": settings.seed,
                                         "graph_fingerprint": fingerprint(graph),
                                         "partition": details})


def _relative(got: float, want: float) -> float:
    scale = abs(want)
    return abs(got - want) / scale if scale > 0 else abs(got - want)


def compare_runs(run, ref, survey_plan: dict, epochs: int) -> dict:
    """The check: every epoch's loss and the final weights of the partitioned run against
    the reference, relative to the reference (weights: max |difference| over the array's
    max |value|, as tests/test_train_equivalence.py measures), and the measured payload
    against the survey's prediction for this plan (and the run's own)."""
    from shardtrain.plan.survey import predict_run_payload
    from shardtrain.train import model

    if len(run.epochs) != len(ref.epochs):
        raise RunError(f"the partitioned run reported {len(run.epochs)} epochs, the "
                       f"reference {len(ref.epochs)}")
    loss_rel = [_relative(a["loss"], b["loss"]) for a, b in zip(run.epochs, ref.epochs)]
    got_w, want_w = model.params_to_arrays(run.params), model.params_to_arrays(ref.params)
    weight_rel = {}
    for name, w in want_w.items():
        scale = float(np.max(np.abs(w))) if w.size else 0.0
        diff = float(np.max(np.abs(got_w[name] - w))) if w.size else 0.0
        weight_rel[name] = diff / scale if scale > 0 else diff
    worst_epoch = int(np.argmax(loss_rel)) + 1
    max_loss = float(max(loss_rel))
    max_weight = float(max(weight_rel.values()))
    measured = int(run.traffic["measured_payload_bytes"])
    predicted_run = int(run.traffic["predicted_payload_bytes"])
    predicted_survey = predict_run_payload(survey_plan["traffic"], epochs, epochs)
    equal = max_loss <= RTOL and max_weight <= RTOL
    bytes_equal = measured == predicted_survey == predicted_run
    return {
        "rtol": RTOL,
        "epochs_compared": len(loss_rel),
        "max_loss_rel_diff": max_loss,
        "worst_loss_epoch": worst_epoch,
        "max_weight_rel_diff": max_weight,
        "weight_rel_diff": weight_rel,
        "max_rel_diff": max(max_loss, max_weight),
        "predictions_agree": bool(np.array_equal(run.predictions, ref.predictions)),
        "reference_final_loss": ref.epochs[-1]["loss"],
        "partitioned_final_loss": run.epochs[-1]["loss"],
        "equal_to_reference": bool(equal),
        "measured_payload_bytes": measured,
        "predicted_payload_bytes": predicted_survey,
        "run_predicted_payload_bytes": predicted_run,
        "breakdown_matches": bool(run.traffic.get("breakdown_matches", bytes_equal)),
        "payload_equal": bool(bytes_equal),
        "passed": bool(equal and bytes_equal),
    }


def check_failure(check: dict) -> str | None:
    """The RunError message of a failed check, with its numbers; None when it passed."""
    problems = []
    if not check["equal_to_reference"]:
        problems.append(f"partitioned training differs from the reference: max relative "
                        f"difference {check['max_loss_rel_diff']:.3e} in the loss (epoch "
                        f"{check['worst_loss_epoch']}), {check['max_weight_rel_diff']:.3e} in "
                        f"the weights (allowed {check['rtol']:g})")
    if not check["payload_equal"]:
        problems.append(f"measured payload {check['measured_payload_bytes']:,} bytes, survey "
                        f"predicted {check['predicted_payload_bytes']:,} bytes, run predicted "
                        f"{check['run_predicted_payload_bytes']:,} bytes")
    return "; ".join(problems) or None


# ---------------------------------------------------------------- step 4: forecast

def plan_forecasts(forecast_dict: dict, plan: dict) -> list[dict]:
    """The chosen plan's forecast at every link speed, slowest link first."""
    rows = [p for p in forecast_dict["plans"]
            if p["method"] == plan["method"] and p["workers"] == plan["workers"]]
    return [{key: p[key] for key in ("link_gbps", "epoch_s", "compute_s", "exchange_s",
                                     "allreduce_s", "wait_s", "bottleneck")}
            for p in sorted(rows, key=lambda p: p["link_gbps"])]


# ---------------------------------------------------------------- step 5: report

def summary_html(result_facts: list[tuple[str, str]]) -> str:
    """The demo's summary as a definition list, for the top of the report."""
    items = "".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>"
                    for k, v in result_facts)
    return (f'<h2>What the demo did</h2><dl class="facts">{items}</dl>'
            '<p class="note">The invented parcel-delivery network: depots are vertices, '
            "daily truck routes are edges, weekly volume and facility statistics are the "
            "features, the depot's role is the label.</p>")


def write_demo_report(folder: Path, out_html: Path, facts: list[tuple[str, str]],
                      plot_dir: Path, plan: dict | None = None,
                      title: str = "shardtrain demo: a parcel-delivery network") -> None:
    """The page of `report.build_html` for the folder's survey, run and forecast JSONs, with
    the demo's summary after the title, the survey's heat map of the chosen `plan`, and
    the pictures kept in `plot_dir`."""
    from shardtrain.files import write_text_atomic
    from shardtrain.report.html import build_html, collect_documents

    write_text_atomic(out_html, build_html(collect_documents([folder]), title,
                                           plot_dir=plot_dir, intro_html=summary_html(facts),
                                           survey_plan=plan))


def summary_facts(r: "DemoResult", settings_doc: dict) -> list[tuple[str, str]]:
    from shardtrain.units import human_bytes

    c, p = r.check, r.plan
    facts = [
        ("network", f"{r.graph['vertices']:,} depots, {r.graph['edges']:,} routes, "
                    f"{r.graph['classes']} roles, {r.graph['features']} features"),
        ("chosen plan", f"{p['method']} on {p['workers']} workers: {p['reason']}"),
        ("training", f"{settings_doc['epochs']} epochs, {settings_doc['layers']} layers, "
                     f"{settings_doc['hidden']} hidden, dropout {settings_doc['dropout']:g}, "
                     f"lr {settings_doc['lr']:g}, weight decay {settings_doc['weight_decay']:g} "
                     f"(Kipf & Welling 2017), {settings_doc['dtype']}"),
        ("test accuracy", f"{_fmt_acc(r.final.get('test_acc'))} (chance: majority role "
                          f"{r.chance['majority']:.3f}, uniform {r.chance['uniform']:.3f})"),
        ("equal to the reference", f"{'yes' if c['equal_to_reference'] else 'NO'}: max "
                                   f"relative difference {c['max_rel_diff']:.2e} (loss of "
                                   f"every epoch and final weights; allowed {c['rtol']:g})"),
        ("payload", f"measured {c['measured_payload_bytes']:,} bytes "
                    f"({human_bytes(c['measured_payload_bytes'])}) "
                    f"{'==' if c['payload_equal'] else '!='} predicted "
                    f"{c['predicted_payload_bytes']:,} bytes"),
    ]
    for f in r.forecast:
        facts.append((f"forecast at {f['link_gbps']:g} Gbit/s",
                      f"{human_seconds(f['epoch_s'])} per epoch (compute "
                      f"{human_seconds(f['compute_s'])}, "
                      f"exchange {human_seconds(f['exchange_s'])}, all-reduce "
                      f"{human_seconds(f['allreduce_s'])}; bound by {f['bottleneck']})"))
    facts.append(("time until this report", f"{r.total_s:.1f} s on this machine (" + ", ".join(
        f"{k} {v:.1f} s" for k, v in r.seconds.items()) + ")"))
    return facts


def _fmt_acc(v) -> str:
    return "-" if v is None else f"{v:.3f}"


def chance_levels(graph) -> dict:
    """Accuracy of guessing: the majority role among the test depots, and 1 / classes."""
    labels = graph.labels[graph.test_mask] if graph.test_mask is not None else graph.labels
    labels = labels[labels >= 0]
    counts = np.bincount(labels, minlength=graph.num_classes) if labels.size else np.zeros(1)
    return {"majority": float(counts.max() / max(counts.sum(), 1)),
            "uniform": 1.0 / max(graph.num_classes, 1)}


# ---------------------------------------------------------------- the demo

class Background:
    """fn(*args) in a daemon thread, so the single-process reference trains while the
    coordinator (whose thread only waits on pipes) runs the workers; `result()` joins and
    re-raises what fn raised. Daemon: a failed or interrupted demo does not wait for it."""

    def __init__(self, fn, *args):
        self._out: dict = {}
        self._thread = threading.Thread(target=self._run, args=(fn, args), daemon=True,
                                        name="shardtrain-demo-reference")
        self._thread.start()

    def _run(self, fn, args) -> None:
        try:
            self._out["value"] = fn(*args)
        except BaseException as exc:      # handed to the thread that calls result()
            self._out["error"] = exc

    def result(self):
        self._thread.join()
        if "error" in self._out:
            raise self._out["error"]
        return self._out["value"]


def train_reference_pinned(graph, settings):
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
    """Run the five steps into `settings.out` (see the module docstring); parent folders
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
        say("[5/5] drawing the pictures and writing the HTML report")
        write_demo_report(tmp, tmp / REPORT_FILE, facts, tmp / PLOT_DIR, plan=result.plan)
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
                     "methods": list(settings.methods), "survey_workers": settings.plan_workers,
                     "links_gbps": list(settings.links_gbps), "latency_us": settings.latency_us},
            "graph": r.graph, "plan": r.plan, "final": r.final, "chance": r.chance,
            "check": {k: v for k, v in r.check.items() if k != "weight_rel_diff"},
            "forecast": r.forecast, "fastest": r.fastest, "seconds": r.seconds,
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
    say(f"[1/5] synthesizing the parcel network: {settings.vertices:,} depots, "
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
    workers_list = settings.plan_workers
    say(f"[2/5] surveying {len(settings.methods)} methods x workers "
        f"{','.join(map(str, workers_list))}")
    survey_dict = survey(graph, list(settings.methods), workers_list, survey_settings)
    survey_dict["graph"]["source"] = GRAPH_FILE
    write_json_atomic(tmp / SURVEY_FILE, survey_dict)
    t = clock.step("survey", t)

    # 3. the best plan, trained partitioned and single-process
    plan = choose_plan(survey_dict, settings.workers)
    survey_plan = next(p for p in survey_dict["plans"]
                       if p["method"] == plan["method"] and p["workers"] == plan["workers"])
    say(f"[3/5] best plan for {plan['workers']} workers: {plan['method']} ({plan['reason']})")
    build_plan_shards(graph, plan, settings, tmp / SHARD_DIR)
    say(f"      training {settings.epochs} epochs on {plan['workers']} worker processes and, "
        f"alongside, in one process (float64; {plan['workers'] + 1} busy processes, BLAS on "
        f"one thread each, on {os.cpu_count()} cores)")
    report_every = max(1, settings.epochs // 4)

    def progress(rec):
        if rec["epoch"] % report_every == 0 or rec["epoch"] == settings.epochs:
            say(f"      epoch {rec['epoch']}/{settings.epochs}: loss {rec['loss']:.4f}, "
                f"test accuracy {_fmt_acc(rec['test_acc'])}")

    reference = Background(train_reference_pinned, graph, train_settings)
    outcome = train(RunConfig(source=str(tmp / SHARD_DIR), settings=train_settings,
                              timeout_s=TIMEOUT_S), on_epoch=progress, signals=False)
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
                           run, mode="partitioned", plan=plan, check=check)
    write_json_atomic(tmp / RUN_FILE, run_doc)
    t = clock.step("train", t)

    # 4. the forecast, from this machine's kernels timed once (sparse on the graph's own Â)
    say(f"[4/5] forecasting links of {' and '.join(f'{g:g}' for g in settings.links_gbps)} "
        f"Gbit/s (timing this machine's kernels first)")
    calibration = with_graph_sparse(calibrate(train_settings.dtype), graph,
                                    train_settings.dtype)
    forecast_dict = forecast(survey_dict, link_gbps_list=list(settings.links_gbps),
                             latency_us=settings.latency_us, calibration=calibration,
                             dropout=train_settings.dropout)
    forecast_dict["source"] = SURVEY_FILE
    write_json_atomic(tmp / FORECAST_FILE, forecast_dict)
    clock.step("forecast", t)

    return DemoResult(out_dir=tmp, report=tmp / REPORT_FILE, files=[], graph=graph_facts,
                      plan=plan, final=dict(run.epochs[-1]), chance=chance_levels(graph),
                      check=check, forecast=plan_forecasts(forecast_dict, plan),
                      fastest=forecast_dict.get("fastest"),
                      settings_doc=train_settings.to_dict())
