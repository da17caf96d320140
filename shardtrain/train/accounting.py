"""The account of a partitioned run, one place for pipes and MPI: the epoch records
summed from the workers' reports, and the result assembled from every worker's summary
(predictions and labels by global id, weights, merged profile, per-worker rows, traffic
measured against the survey's prediction). The prediction is computed from the send and
halo pointers each summary carries (the shard headers' own), through the survey's
`peer_rows` and `predict_*_of_rows`: the same numbers as from the shards themselves.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np

from shardtrain.errors import InputError, RunError
from shardtrain.train import model
from shardtrain.train.settings import TrainSettings
from shardtrain.transport.wire import KIND_ALLREDUCE, KIND_HALO


@dataclass
class PartitionedRunResult:
    """What `train_partitioned` returns: the reference's RunResult fields plus the account
    of the run (traffic measured and predicted, per-worker rows, merged profile)."""

    epochs: list[dict]
    params: model.Params
    predictions: np.ndarray
    traffic: dict = field(default_factory=dict)
    workers: list[dict] = field(default_factory=list)
    profile: dict = field(default_factory=dict)
    labels: np.ndarray | None = None     # the shards' labels by global id (-1: none)
    early_stop: dict | None = None       # stopping.EarlyStop.summary(), or None when off


# ---------------------------------------------------------------- shard directory facts

@dataclass(frozen=True)
class ShardDirFacts:
    workers: int
    num_vertices: int
    num_classes: int
    input_dim: int


def shard_dir_facts(shard_dir, manifest: dict | None = None) -> ShardDirFacts:
    """Worker count, graph size, classes and feature width from the shard manifest
    (checked by `shards.load_manifest`; pass `manifest` when it is already read)."""
    from shardtrain.plan.shards import SHARDS_MANIFEST, load_manifest

    m = manifest if manifest is not None else load_manifest(shard_dir)
    if m.get("input_dim") is None:
        raise InputError(f"{os.path.join(str(shard_dir), SHARDS_MANIFEST)}: the shards have no "
                         f"vertex features (input_dim null): nothing to train on")
    return ShardDirFacts(workers=m["workers"], num_vertices=m["num_vertices"],
                         num_classes=m["num_classes"], input_dim=m["input_dim"])


# ---------------------------------------------------------------- epoch records

def epoch_record(epoch: int, reports: list[dict]) -> dict:
    """Sum the workers' parts (in rank order) into the reference's epoch record.

    val_loss: the global mean the workers decided on with early stopping (their
    all-reduced value, so the record and the stop decision agree to the bit), else the
    sum of the workers' cross-entropy sums over the global validation count."""
    train_loss = sum(r["loss_part"] for r in reports)
    loss = train_loss + reports[0]["penalty"]
    correct = np.sum([r["correct"] for r in reports], axis=0)
    totals = np.sum([r["totals"] for r in reports], axis=0)
    acc = [model.accuracy(int(c), int(t)) for c, t in zip(correct, totals)]
    if "val_loss" in reports[0]:
        val_loss = reports[0]["val_loss"]
    else:
        val_loss = model.mean_loss(sum(r.get("val_loss_sum", 0.0) for r in reports),
                                   int(totals[1]))
    return {"epoch": epoch, "loss": loss, "train_loss": train_loss, "val_loss": val_loss,
            "train_acc": acc[0], "val_acc": acc[1], "test_acc": acc[2],
            "epoch_s": max(r["step_s"] for r in reports)}


def check_epochs_run(records: list[dict], summaries: list[dict], epochs: int) -> None:
    """Every worker ran the same epochs, all reported: `epochs`, or fewer when early
    stopping ended the run (the summaries say where)."""
    runs = sorted({int(s.get("epochs_run", epochs)) for s in summaries})
    if len(runs) != 1:
        raise RunError(f"workers ran different numbers of epochs ({runs}): the early-stop "
                       f"decision was not unanimous")
    stopped = (summaries[0].get("early_stop") or {}).get("stopped_at") is not None
    if len(records) != runs[0] or (runs[0] != epochs and not stopped):
        raise RunError(f"workers finished after {len(records)} of {epochs} epochs")


# ---------------------------------------------------------------- results

def assemble_result(records, summaries, facts: ShardDirFacts, settings: TrainSettings,
                    epochs_run: int | None = None) -> PartitionedRunResult:
    """One result from the epoch records and every worker's `run_worker` summary (in rank
    order): predictions and labels by global id, worker 0's weights, merged profile,
    traffic measured against predicted, per-worker rows. Transport-agnostic (pipes or MPI).
    """
    from shardtrain.transport.meter import merge

    k = facts.workers
    epochs_run = len(records) if epochs_run is None else int(epochs_run)
    early_stop = summaries[0].get("early_stop")
    evals = epochs_run + max(int(s.get("extra_evals", 0)) for s in summaries)
    predictions = np.full(facts.num_vertices, -1, dtype=np.int64)
    labels = np.full(facts.num_vertices, -1, dtype=np.int64)
    for s in summaries:
        predictions[s["owned"]] = s["predictions"]
        labels[s["owned"]] = s["labels"]
    dims = model_dims_of(facts, settings)
    params = model.params_from_arrays(summaries[0]["params"], dims, settings.bias,
                                      settings.np_dtype, source="worker 0",
                                      hops=settings.hops(dims))
    merged = merge([s["profile"] for s in summaries])
    traffic = traffic_account(merged, [s["profile"] for s in summaries],
                              [s["send_ptr"] for s in summaries],
                              [s["halo_ptr"] for s in summaries], dims, settings,
                              epochs=epochs_run, evals=evals,
                              stop_votes=epochs_run if early_stop else 0,
                              halo_kept=[s.get("halo_kept") for s in summaries])
    rows = []
    for row, s in zip(merged["per_worker"], summaries):
        rows.append({"worker": row["rank"], "compute_s": row["compute_s"],
                     "exchange_s": row["exchange_s"], "allreduce_s": row["allreduce_s"],
                     "wait_s": row["wait_s"], "bytes_sent": row["bytes_sent"],
                     "bytes_received": row["bytes_received"], "cpu_s": row["cpu_s"],
                     "process_cpu_s": s["cpu_s"], "peak_rss_bytes": s["peak_rss_bytes"],
                     # started exchanges (a stale scheme): time in flight, and the part of
                     # it the worker computed through (meter.Profile "overlap")
                     "exchange_in_flight_s": s["profile"].get("overlap", {}).get(
                         "in_flight_s", 0.0),
                     "hidden_exchange_s": row["hidden_exchange_s"]})
    assert len(rows) == k
    profile = {key: v for key, v in merged.items() if key != "per_worker"}
    return PartitionedRunResult(records, params, predictions, traffic, rows, profile, labels,
                                early_stop)


def model_dims_of(facts: ShardDirFacts, settings: TrainSettings) -> list[tuple[int, int]]:
    return settings.model_dims(facts.input_dim, facts.num_classes)


def traffic_account(merged: dict, profiles: list[dict], send_ptrs: list, halo_ptrs: list,
                    dims, settings: TrainSettings, epochs: int | None = None,
                    evals: int | None = None, stop_votes: int = 0,
                    halo_kept: list | None = None) -> dict:
    """Measured payload and framing (from the merged profile) against the survey's
    prediction, in total and per (src, dst, kind, layer, direction). The prediction reads
    every worker's `send_ptr` and `halo_ptr` (in worker order). The all-reduce is
    compared per (src, dst): its steps' direction names are the transport's own.
    `epochs`: the epochs this run did (fewer than settings.epochs after a resume or an
    early stop); `evals`: its evaluation forwards (default `epochs`); `stop_votes`: its
    early-stopping votes (see `survey.stop_vote_bytes`). Under a halo scheme
    (`settings.scheme` not exact) the halo rows of the training exchanges are
    `schemes.scheme_payload_breakdown` of `halo_kept` (each worker's
    `schemes.worker_kept_rows` replay, from its summary) and the total is the breakdown's."""
    from shardtrain.plan import survey

    hops = settings.hops(dims)
    itemsize = settings.np_dtype.itemsize
    elements = survey.parameter_elements(hops, bias=settings.bias)
    send_rows, halo_rows = survey.peer_rows(send_ptrs, halo_ptrs)
    predicted = survey.predict_traffic_of_rows(send_rows, halo_rows, hops, itemsize,
                                               param_elements=elements)
    epochs = settings.epochs if epochs is None else int(epochs)
    evals = epochs if evals is None else int(evals)
    predicted_total = survey.predict_run_payload(predicted, epochs, evals, stop_votes)
    breakdown_pred = survey.predict_payload_breakdown_of_rows(
        send_rows, halo_rows, hops, itemsize, param_elements=elements, epochs=epochs,
        evals=evals, stop_votes=stop_votes)
    scheme = settings.scheme
    if not scheme.exact(settings.np_dtype):
        from shardtrain.plan import schemes

        if halo_kept is None or any(h is None for h in halo_kept):
            raise RunError("a worker's summary lacks its kept halo rows (halo_kept)")
        kept = np.stack([np.asarray(h, dtype=np.int64).reshape(-1, len(send_ptrs))
                         for h in halo_kept], axis=1)
        breakdown_pred = {key: b for key, b in breakdown_pred.items() if key[2] != KIND_HALO}
        breakdown_pred.update(schemes.scheme_payload_breakdown(
            kept, halo_rows, hops, settings.np_dtype, scheme, evals=evals))
        predicted_total = int(sum(breakdown_pred.values()))
        expected = schemes.expected_epoch_halo_bytes(halo_rows, hops, settings.np_dtype,
                                                     scheme)
        predicted = dict(predicted, halo_scheme=dict(
            scheme.to_dict(), expected_forward_bytes=expected["forward_bytes"],
            expected_backward_bytes=expected["backward_bytes"]))

    def key_of(src, dst, kind, layer, direction):
        if kind == KIND_ALLREDUCE:
            return (src, dst, kind, layer, "all")
        return (src, dst, kind, layer, direction)

    table: dict[tuple, list[int]] = {}
    for key, b in breakdown_pred.items():
        table.setdefault(key_of(*key), [0, 0, 0])[1] += int(b)
    measured_rows = _sender_rows(profiles)
    for key, (pay, framing) in measured_rows.items():
        row = table.setdefault(key_of(*key), [0, 0, 0])
        row[0] += pay
        row[2] += framing
    breakdown = [{"src": s, "dst": d, "kind": kind, "layer": layer, "direction": direction,
                  "measured_payload_bytes": v[0], "predicted_payload_bytes": v[1],
                  "framing_bytes": v[2]}
                 for (s, d, kind, layer, direction), v in sorted(table.items())]
    by_kind = merged["by_kind"]
    return {
        "measured_payload_bytes": int(merged["payload_bytes"]),
        "predicted_payload_bytes": int(predicted_total),
        "measured_framing_bytes": int(merged["framing_bytes"]),
        "frames": int(merged["frames"]),
        "halo_payload_bytes": int(by_kind.get(KIND_HALO, {}).get("payload_bytes", 0)),
        "allreduce_payload_bytes": int(by_kind.get(KIND_ALLREDUCE, {})
                                       .get("payload_bytes", 0)),
        "predicted_allreduce_payload_bytes": int(
            epochs * predicted["allreduce_bytes"]
            + stop_votes * int(survey.stop_vote_bytes(len(send_ptrs)).sum())),
        "predicted_per_epoch": predicted,
        "sender_receiver_consistent": bool(merged["consistent"]),
        "pair_payload_bytes": merged["pair_payload_bytes"],
        "by_layer_direction": merged["by_layer_direction"],
        "breakdown": breakdown,
        "breakdown_matches": all(r["measured_payload_bytes"] == r["predicted_payload_bytes"]
                                 for r in breakdown),
    }


def _sender_rows(profiles: list[dict]) -> dict[tuple, tuple[int, int]]:
    """(src, dst, kind, layer, direction) -> (payload, framing), from the senders' side."""
    return {(r["src"], r["dst"], r["kind"], r["layer"], r["direction"]):
            (r["payload_bytes"], r["framing_bytes"])
            for d in profiles for r in d["bytes"] if r["src"] == d["rank"]}
