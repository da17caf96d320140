"""What the demo does (`DemoSettings`), its file names and limits, and the check of its
output folder before any work."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from shardtrain import defaults
from shardtrain.errors import InputError, ParameterError, name_parameter, option

GRAPH_FILE = "parcel-network.npz"
SURVEY_FILE = "survey.json"
RUN_FILE = "run.json"
FORECAST_FILE = "forecast.json"
REPORT_FILE = "report.html"
SUMMARY_FILE = "demo.json"       # also marks a folder as a demo's, for --overwrite
SHARD_DIR = "shards"
CHECKPOINT_DIR = "checkpoint"    # the main run's last checkpoint, for the warm restart
GROWTH_DIR = "growth"            # weekly deltas, update reports, the last week's shards
GROWTH_WEEKS = 4
WARM_EPOCHS = 10                 # epochs of the warm restart (at most the demo's epochs)
PLOT_DIR = "plots"

METHODS = defaults.DEMO_METHODS
SURVEY_WORKERS = defaults.SURVEY_WORKERS
LINKS_GBPS = defaults.DEMO_LINKS_GBPS
LATENCY_US = defaults.LATENCY_US
RTOL = 1e-9                      # docs/design.md §1.7: float64 partitioned == reference
MAX_WORKERS = 16                 # more processes than that only slow a 2-core machine down
MIN_VERTICES = 200
TIMEOUT_S = 120.0                # receive deadline; generous because the machine is shared

# Full-size defaults: the demo (synth, survey of 15 plans, 100 epochs on 4 workers plus the
# reference, calibration, forecast, report) takes well under 2 minutes on a busy 2-core
# machine. --quick: tiny sizes for tests.
DEFAULT_VERTICES = defaults.DEMO_VERTICES
DEFAULT_EPOCHS = defaults.DEMO_EPOCHS
QUICK_VERTICES = defaults.DEMO_QUICK_VERTICES
QUICK_EPOCHS = defaults.DEMO_QUICK_EPOCHS


@dataclass(frozen=True)
class DemoSettings:
    """What the demo does. The network's shape follows `shardtrain synth`'s defaults; the
    training settings are the GCN paper's (Kipf & Welling 2017; `settings.TrainSettings`)
    except the epoch count and the dtype (float64, so the equality check is to rounding)."""

    out: str = defaults.DEMO_OUT
    vertices: int = DEFAULT_VERTICES
    workers: int = defaults.DEMO_WORKERS
    epochs: int = DEFAULT_EPOCHS
    seed: int = defaults.SEED
    overwrite: bool = False
    avg_degree: float = defaults.SYNTH_AVG_DEGREE
    classes: int = defaults.SYNTH_CLASSES
    features: int = defaults.SYNTH_FEATURES
    methods: tuple = METHODS
    survey_workers: tuple = SURVEY_WORKERS
    links_gbps: tuple = LINKS_GBPS
    latency_us: float = LATENCY_US

    @classmethod
    def quick(cls, **kw) -> "DemoSettings":
        return cls(**{"vertices": QUICK_VERTICES, "epochs": QUICK_EPOCHS, **kw})

    def validate(self) -> "DemoSettings":
        """ParameterError naming the first bad setting; checks the output folder."""
        def need(ok, param, rule, value):
            if not ok:
                raise ParameterError(param, f"must be {rule}", value=value)

        need(_is_int(self.vertices) and self.vertices >= MIN_VERTICES, "vertices",
             f"an integer >= {MIN_VERTICES}", self.vertices)
        need(_is_int(self.workers) and 2 <= self.workers <= min(MAX_WORKERS, self.vertices),
             "workers", f"an integer from 2 to {MAX_WORKERS} (the demo compares several "
             f"workers with one process)", self.workers)
        need(_is_int(self.epochs) and self.epochs >= 1, "epochs", "an integer >= 1",
             self.epochs)
        need(_is_int(self.seed) and self.seed >= 0, "seed", "an integer >= 0", self.seed)
        check_out_dir(self.out, self.overwrite)
        return self

    @property
    def surveyed_workers(self) -> list[int]:
        """Surveyed worker counts: the standard ones plus the chosen count."""
        return sorted(set(self.survey_workers) | {self.workers})


def _is_int(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


def check_out_dir(out, overwrite: bool) -> None:
    """Refuse, before any work, an output that is a file, a non-empty folder without
    --overwrite, or (with --overwrite) a non-empty folder that is not an earlier demo's."""
    p = Path(out)

    def refuse(text: str) -> ParameterError:
        return ParameterError("out", text, value=out)

    if p.exists() and not p.is_dir():
        raise refuse("exists and is not a folder")
    if p.is_dir() and any(p.iterdir()):
        if not overwrite:
            raise refuse("folder exists and is not empty "
                         f"(give {option('overwrite')} to replace an earlier demo, or another "
                         f"{option('out')})")
        if not (p / SUMMARY_FILE).is_file():
            raise refuse(f"not an earlier demo's folder (no {SUMMARY_FILE}); "
                         f"{option('overwrite')} only replaces those")
    parent = p.absolute().parent
    if parent.exists() and not parent.is_dir():
        raise refuse(f"{parent} is not a folder")
    from shardtrain.files import current_folder, is_inside, probe_folder

    if is_inside(current_folder(), p):   # renaming the folder we stand in cannot work
        raise refuse("is or holds the current folder, which the demo "
                     f"cannot replace (run it from another folder or give another "
                     f"{option('out')})")
    while not parent.exists():     # the demo creates missing parent folders
        parent = parent.parent
    if not parent.is_dir():
        raise refuse(f"{parent} is not a folder")
    try:
        probe_folder(parent, f"out {out}")
    except InputError as exc:
        raise name_parameter(exc, "out", out) from None
