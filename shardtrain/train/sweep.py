"""Train every combination of halo-scheme settings in turn and price each against the exact
scheme: measured halo payload per epoch, measured epoch time, final test accuracy and test
accuracy at the best validation epoch.

    doc = sweep(RunConfig(source=..., workers=4, method="metis", settings=...),
                {"halo_keep": [1, 0.3, 0.1], "halo_format": [None, "int8"]})

The axes are settings fields of `TrainSettings` (`AXES`); a new scheme setting (a stale-halo
switch, say) becomes one more entry there and is swept the same way. Every combination is
one `api.run` of the base config with those settings replaced; the exact scheme (every axis
at its default) is trained too, first, when the axes leave it out: the ratios need it.
"Best validation epoch": the epoch of the highest validation accuracy (the earliest on
ties). Halo payload: the training exchanges (forward and backward) the run measured,
divided by its epochs; the evaluation forward (exact, direction "eval") is apart.
Nothing here prints; `on_run(row)` sees each row as it is done.
"""
from __future__ import annotations

import itertools
import statistics
from dataclasses import replace
from typing import Callable

from shardtrain import defaults
from shardtrain.errors import ParameterError

# settings field -> its default (the exact scheme)
AXES: dict[str, object] = {"halo_keep": defaults.HALO_KEEP, "halo_format": defaults.HALO_FORMAT,
                           "halo_stale": defaults.HALO_STALE}


def combinations(axes: dict[str, list]) -> list[dict]:
    """Every combination of the axes' values (in the given order), the exact one first."""
    for name, values in axes.items():
        if name not in AXES:
            raise ParameterError(name, f"cannot be swept (sweepable: {', '.join(AXES)})")
        if not values:
            raise ParameterError(name, "needs at least one value")
    names = list(axes)
    combos = [dict(zip(names, values)) for values in itertools.product(*axes.values())]
    exact = {name: AXES[name] for name in names}
    return [exact] + [c for c in combos if c != exact]


def _normal(combo: dict, dtype: str) -> dict:
    """The format named by the training dtype is the exact one (the same run)."""
    out = dict(combo)
    if out.get("halo_format") == dtype:
        out["halo_format"] = None
    return out


def sweep(config, axes: dict[str, list], *, transport: str = defaults.TRANSPORT,
          on_run: Callable[[dict], None] | None = None) -> dict:
    """One row per combination (see the module text) and the sweep document."""
    from shardtrain.train.api import run

    base = config.settings
    seen: list[dict] = []
    rows: list[dict] = []
    graph: dict = {}
    for combo in combinations(axes):
        settings = replace(base, **combo).validate()
        key = _normal(combo, settings.dtype)
        if key in seen:                     # float32 on a float32 run: the exact run again
            continue
        seen.append(key)
        outcome = run(replace(config, settings=settings), transport=transport, signals=False)
        assert outcome is not None          # pipes: the one process gets the outcome
        graph = graph or dict(outcome.document["graph"])
        row = run_row(combo, outcome.result)
        if rows:
            add_ratios(row, rows[0])
        else:
            add_ratios(row, row)
        rows.append(row)
        if on_run is not None:
            on_run(row)
    return {"kind": "sweep", "format": "shardtrain-sweep", "version": 1,
            "axes": {k: list(v) for k, v in axes.items()}, "graph": graph,
            "workers": rows[0]["workers"] if rows else None, "epochs": base.epochs,
            "settings": base.to_dict(), "rows": rows}


def run_row(combo: dict, result) -> dict:
    """The measured figures of one trained run (`accounting.PartitionedRunResult`)."""
    epochs = result.epochs
    halo = eval_bytes = 0
    for r in result.traffic["breakdown"]:
        if r["kind"] != "halo":
            continue
        if r["direction"] == "eval":
            eval_bytes += r["measured_payload_bytes"]
        else:
            halo += r["measured_payload_bytes"]
    best = max(range(len(epochs)), key=lambda i: (_acc(epochs[i]["val_acc"]), -i))
    return {"scheme": dict(combo), "workers": len(result.workers), "epochs_run": len(epochs),
            "halo_payload_per_epoch": halo / len(epochs),
            "eval_payload_per_epoch": eval_bytes / len(epochs),
            "payload_equals_prediction": result.traffic["measured_payload_bytes"]
            == result.traffic["predicted_payload_bytes"],
            "epoch_s": statistics.median(e["epoch_s"] for e in epochs),
            "final_test_acc": epochs[-1]["test_acc"],
            "best_val_epoch": epochs[best]["epoch"],
            "test_acc_at_best_val": epochs[best]["test_acc"]}


def _acc(value) -> float:
    return -1.0 if value is None else float(value)


def add_ratios(row: dict, exact: dict) -> None:
    """Each figure relative to the exact scheme's: payload and time as ratios, accuracies
    as differences in points (percentage points)."""
    def ratio(a, b):
        return None if not b else a / b

    def points(a, b):
        return None if a is None or b is None else 100.0 * (a - b)

    row["halo_payload_ratio"] = ratio(row["halo_payload_per_epoch"],
                                      exact["halo_payload_per_epoch"])
    row["epoch_s_ratio"] = ratio(row["epoch_s"], exact["epoch_s"])
    row["final_test_acc_points"] = points(row["final_test_acc"], exact["final_test_acc"])
    row["test_acc_at_best_val_points"] = points(row["test_acc_at_best_val"],
                                                exact["test_acc_at_best_val"])
