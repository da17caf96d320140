"""The demo's policy: which surveyed plan it trains (`pick`: the least predicted payload per
training epoch at the asked worker count), why (`choice_reason`), its shards and its
forecasts. The dict `pick` returns is the demo's *choice* (method, workers, payload,
reason, ranking); "plan" stays the word for a survey plan."""
from __future__ import annotations

from pathlib import Path

from shardtrain.demo.settings import DemoSettings
from shardtrain.errors import RunError


def pick(survey_dict: dict, workers: int) -> dict:
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
            "reason": choice_reason(ranking), "ranking": ranking}


def choice_reason(ranking: list[dict]) -> str:
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


def build_choice_shards(graph, choice: dict, settings: DemoSettings,
                        shard_dir: Path) -> None:
    """Partition as the survey did (same method, seed and imbalance) and save the shards."""
    from shardtrain.data.graph import fingerprint
    from shardtrain.plan.partition import partition_plan
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.plan.survey import SurveySettings

    imbalance = SurveySettings().imbalance   # what the survey partitioned with
    k = choice["workers"]
    assignment, details = partition_plan(graph, choice["method"], k, seed=settings.seed,
                                         imbalance=imbalance)
    shards = build_shards(graph, assignment, k)
    save_shards(shard_dir, shards, meta={"num_classes": graph.num_classes,
                                         "input_dim": graph.input_dim,
                                         "method": choice["method"], "seed": settings.seed,
                                         "graph_fingerprint": fingerprint(graph),
                                         "partition": details})


def choice_forecasts(forecast_dict: dict, choice: dict) -> list[dict]:
    """The chosen plan's forecast at every link speed, slowest link first."""
    rows = [p for p in forecast_dict["plans"]
            if p["method"] == choice["method"] and p["workers"] == choice["workers"]]
    return [{key: p[key] for key in ("link_gbps", "epoch_s", "compute_s", "exchange_s",
                                     "allreduce_s", "wait_s", "bottleneck")}
            for p in sorted(rows, key=lambda p: p["link_gbps"])]
