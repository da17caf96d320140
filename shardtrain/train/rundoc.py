"""The run document: what `shardtrain train --json` writes (and the demo's run.json).

One layout for every producer (pipes, MPI, the demo) and one naming of the graph's size
for every JSON we write: `graph.vertices` and `graph.edges`, as the survey has them.

    {"settings": {...}, "graph": {"source" | "shard_dir", "vertices", ["edges"], ...},
     "mode": "reference" | "partitioned" | "single-process", "epochs": [...],
     "early_stop": null | {"patience", "best_epoch", "best_val_loss", "stopped_at",
                           "weights": "best epoch"},
     partitioned only: "traffic", "workers", "profile";
     then any extras the producer adds (transport, resumed_from, checkpoint, plan, check ...)}
"""
from __future__ import annotations

from shardtrain.data.graph import structure_fingerprint

MODES = ("reference", "partitioned", "single-process")


def graph_of_file(source, graph, notes=()) -> dict:
    """The `graph` entry of a run on a graph file."""
    return {"source": str(source), "vertices": int(graph.num_vertices),
            "edges": int(graph.num_edges), "notes": list(notes),
            "structure_fingerprint": structure_fingerprint(graph)}


def graph_of_shards(shard_dir, facts) -> dict:
    """The `graph` entry of a run on a shard directory (`accounting.ShardDirFacts`)."""
    return {"shard_dir": str(shard_dir), "vertices": int(facts.num_vertices),
            "workers": int(facts.workers)}


def run_document(settings, graph_doc: dict, result, *, mode: str, **extra) -> dict:
    """The run JSON of `result` (a reference or partitioned training result) trained with
    `settings` (`settings.TrainSettings`); `extra` keys are added after the standard ones."""
    if mode not in MODES:
        raise ValueError(f"mode {mode!r}: expected one of {', '.join(MODES)}")
    doc = {"settings": settings.to_dict(), "graph": dict(graph_doc), "mode": mode,
           "epochs": result.epochs, "early_stop": getattr(result, "early_stop", None)}
    if mode == "partitioned":
        doc.update(traffic=result.traffic, workers=result.workers, profile=result.profile)
    clash = sorted(set(extra) & set(doc))
    if clash:
        raise ValueError(f"extra key {clash[0]!r} would replace a standard one")
    doc.update(extra)
    return doc
