"""The one table from a library parameter to the command-line option that sets it.

Library functions raise `errors.ParameterError` naming their Python parameter
("method 'x': unknown ...") and name other parameters inside a message with
`errors.option("seed")`; `cli.main` words the message with the options from `FLAGS`
("--method 'x': unknown ...", "try another --seed"). A parameter missing here keeps its Python name;
`tests/test_flags.py` checks that every parameter the library raises about is here or in
`NOT_OPTIONS`.
"""
from __future__ import annotations

from shardtrain.errors import InputError, RunError

FLAGS = {
    # GRAPH and its vertex data (cli/common.py)
    "features": "--features", "labels": "--labels", "input_dim": "--input-dim",
    "seed": "--seed",
    # model shape and training (train, survey, forecast, demo)
    "layers": "--layers", "hidden": "--hidden", "classes": "--classes",
    "dropout": "--dropout", "lr": "--lr", "weight_decay": "--weight-decay",
    "epochs": "--epochs", "dtype": "--dtype", "bias": "--bias",
    "early_stop": "--early-stop", "threads": "--threads", "model": "--model",
    "heads": "--heads",
    # halo schemes (plan.schemes.HaloScheme; train, survey, forecast, sweep)
    "halo_keep": "--halo-keep", "halo_format": "--halo-format",
    "halo_stale": "--halo-stale", "halo_smooth": "--halo-smooth",
    # a training run (train.api.RunConfig, api.run's transport)
    "transport": "--transport", "timeout_s": "--timeout", "init_weights": "--init-weights",
    "checkpoint_every": "--checkpoint-every", "max_frame_bytes": "--max-frame-bytes",
    "slow_workers": "--slow-worker", "link": "--emulate-link",
    # plans
    "method": "--method", "workers": "--workers", "imbalance": "--imbalance",
    "assignment": "--assignment", "memory_budget": "--memory-budget",
    # update (plan/update.py)
    "add_edges": "--add-edges", "remove_edges": "--remove-edges",
    "add_vertices": "--add-vertices", "allow_missing": "--allow-missing",
    "repartition_above": "--repartition-above", "fresh": "--no-fresh",
    # forecast
    "link_gbps": "--link-gbps", "latency_us": "--latency-us",
    "speed_factor": "--speed-factor", "cores": "--cores",
    "target_epoch_s": "--target-epoch-s", "flops_per_s": "--flops-per-worker",
    "calibration": "--calibration",
    # synth
    "vertices": "--vertices", "avg_degree": "--avg-degree", "homophily": "--homophily",
    "degree_exponent": "--degree-exponent", "signal": "--signal",
    "grow": "--grow", "growth": "--growth",
    # outputs and folders
    "plot": "--plot", "out": "--out", "overwrite": "--overwrite", "json": "--json",
    "checkpoint": "--checkpoint", "resume": "--resume", "reference": "--reference",
    "single_process": "--single-process",
    "warm_start": "--warm-start",
    "emulate_link": "--emulate-link",
    # databases (ingest --sql, train --predictions-sql)
    "sql": "--sql", "edges_query": "--edges-query", "vertices_query": "--vertices-query",
    "predictions_sql": "--predictions-sql", "predictions_table": "--predictions-table",
    "replace_table": "--replace-table",
}

# parameters a library may name that no option sets (the message keeps the Python name):
# RunConfig.mode, which `train` sets with --reference
NOT_OPTIONS: frozenset[str] = frozenset({"mode"})


def flag_of(param: str) -> str:
    return FLAGS.get(param, param)


def cli_message(exc: InputError | RunError) -> str:
    """The one line the CLI prints for an error: every parameter it names (a
    `ParameterError`'s own, and `errors.option` mentions) as the option a user types."""
    return exc.worded(flag_of)
