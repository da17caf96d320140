"""The demo's growing network: four weekly deltas, each applied with `update`, the drift
against a fresh partition, and a warm restart of training on the last week's shards.

Each week about `defaults.SYNTH_GROWTH` new depots open (`synth.grow_parcel_network`:
attached preferentially to busy depots, by role, plus new routes); `plan.update.update_plan`
keeps every depot on its worker, places the new ones by the Fennel score and reports the
plan's figures beside a fresh partition of that week's network by the same method. Only
the last week's shards are kept. Then training goes on, on that network, from the main
run's last checkpoint (`RunConfig.warm_start`): its weights and Adam state.
"""
from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

from shardtrain import defaults
from shardtrain.demo.settings import GROWTH_DIR, GROWTH_WEEKS, TIMEOUT_S, WARM_EPOCHS


def run_growth(tmp: Path, graph, shard_dir: Path, checkpoint_dir: Path, train_settings,
               survey_settings, plot_dir: Path, say) -> dict:
    """Four updates and the warm restart into tmp/GROWTH_DIR; returns the summary."""
    from shardtrain.data.synth import grow_parcel_network
    from shardtrain.files import save_npz_atomic, write_json_atomic
    from shardtrain.plan.update import update_plan
    from shardtrain.report.plots import drift_plot
    from shardtrain.train.api import RunConfig, run

    folder = tmp / GROWTH_DIR
    folder.mkdir()
    deltas = grow_parcel_network(graph, GROWTH_WEEKS, defaults.SYNTH_GROWTH,
                                 train_settings.seed)
    current, weeks = shard_dir, []
    for week, delta in enumerate(deltas, start=1):
        vertices = folder / f"week{week:02d}.vertices.npz"
        edges = folder / f"week{week:02d}.edges.npz"
        save_npz_atomic(vertices, **delta["vertices"])
        save_npz_atomic(edges, edges=delta["edges"])
        nxt = folder / f"shards-week{week:02d}"
        report = update_plan(current, nxt, add_vertices=vertices, add_edges=edges,
                             fresh=True, settings=survey_settings).report
        write_json_atomic(folder / f"week{week:02d}.update.json", report)
        weeks.append({"week": week, **report})
        say(f"      week {week}: +{report['delta']['vertices_added']:,} depots, "
            f"+{report['delta']['edges_added']:,} routes; payload per epoch of the updated "
            f"plan {report['payload_excess_percent']:+.1f} % of a fresh "
            f"{report['method']} plan")
        if current != shard_dir:
            shutil.rmtree(current)          # only the last week's shards are kept
        current = nxt
    plot = drift_plot(weeks, plot_dir)
    epochs = min(WARM_EPOCHS, train_settings.epochs)
    say(f"      warm restart: {epochs} more epochs on week {GROWTH_WEEKS}'s network from "
        f"the checkpoint of the main run")
    outcome = run(RunConfig(source=str(current),
                            settings=dataclasses.replace(train_settings, epochs=epochs),
                            warm_start=str(checkpoint_dir), timeout_s=TIMEOUT_S),
                  signals=False)        # TRAINING RUN: the warm restart
    assert outcome is not None
    write_json_atomic(folder / "warm-restart.run.json", outcome.document)
    last = outcome.result.epochs[-1]
    return {"weeks": [{"week": w["week"], "delta": w["delta"],
                       "after": w["after"], "fresh": w["fresh"],
                       "payload_excess_percent": w["payload_excess_percent"],
                       "rebuilt": w["rebuilt"]} for w in weeks],
            "plot": plot,
            "warm": {"from_epoch": outcome.document["warm_start"]["epoch"],
                     "epochs": epochs, "final": dict(last),
                     "vertices": weeks[-1]["graph"]["vertices_after"]}}


def growth_facts(growth: dict) -> list[tuple[str, str]]:
    """The summary lines of the growing network."""
    from shardtrain.units import human_bytes

    weeks, warm = growth["weeks"], growth["warm"]
    last = weeks[-1]
    drift = ", ".join(f"week {w['week']} {w['payload_excess_percent']:+.1f} %" for w in weeks
                      if w["payload_excess_percent"] is not None)
    acc = warm["final"].get("test_acc")
    return [
        ("growth", f"{len(weeks)} weekly updates to {last['after']['edge_cut']:,} cut routes "
                   f"and {human_bytes(last['after']['epoch_payload_bytes'])} per epoch; the "
                   f"updated plan's payload against a fresh one: {drift}"),
        ("warm restart", f"{warm['epochs']} more epochs on {warm['vertices']:,} depots from "
                         f"the checkpoint of epoch {warm['from_epoch']}: test accuracy "
                         f"{'-' if acc is None else f'{acc:.3f}'}"),
    ]


def growth_html(growth: dict) -> str:
    """The growing network's section of the report: one row per week and the drift plot."""
    import html

    from shardtrain.report.html import figures_html
    from shardtrain.units import human_bytes

    def row(w: dict) -> str:
        excess = w["payload_excess_percent"]
        cells = [f"{w['week']}", f"{w['delta']['vertices_added']:,}",
                 f"{w['delta']['edges_added']:,}", f"{w['after']['edge_cut']:,}",
                 human_bytes(w["after"]["epoch_payload_bytes"]),
                 "-" if not w["fresh"] else human_bytes(w["fresh"]["epoch_payload_bytes"]),
                 "-" if excess is None else f"{excess:+.1f} %", f"{len(w['rebuilt'])}"]
        return "<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>"

    rows = "".join(row(w) for w in growth["weeks"])
    head = ("<tr><th>week</th><th>new depots</th><th>new routes</th><th>edge cut</th>"
            "<th>payload/epoch</th><th>fresh plan</th><th>excess</th>"
            "<th>shards rebuilt</th></tr>")
    return ("<h2>The network grows</h2><p>Each week new depots open and new routes start "
            "(<code>shardtrain synth --grow</code>); <code>shardtrain update</code> keeps "
            "every depot on its worker and places the new ones by the Fennel score, and "
            "the plan's payload is compared with a fresh partition of that week's network. "
            "Training then continues on the last week's shards from the main run's "
            "checkpoint (<code>train --warm-start</code>).</p>"
            f"<table>{head}{rows}</table>" + figures_html([growth["plot"]]))
