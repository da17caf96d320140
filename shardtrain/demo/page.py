"""The demo's part of the HTML report: the summary facts, their HTML, and the page."""
from __future__ import annotations

import html
from pathlib import Path
from typing import TYPE_CHECKING

from shardtrain.units import human_seconds

if TYPE_CHECKING:
    from shardtrain.demo.workflow import DemoResult


def summary_html(result_facts: list[tuple[str, str]]) -> str:
    """The demo's summary as a definition list, for the top of the report."""
    items = "".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>"
                    for k, v in result_facts)
    return (f'<h2>What the demo did</h2><dl class="facts">{items}</dl>'
            '<p class="note">The invented parcel-delivery network: depots are vertices, '
            "daily truck routes are edges, weekly volume and facility statistics are the "
            "features, the depot's role is the label.</p>")


def write_demo_report(folder: Path, out_html: Path, facts: list[tuple[str, str]],
                      plot_dir: Path, choice: dict | None = None,
                      title: str = "shardtrain demo: a parcel-delivery network",
                      growth: dict | None = None) -> None:
    """The page of `report.build_html` for the folder's survey, run and forecast JSONs, with
    the demo's summary after the title, the survey's heat map of the plan the demo
    chose (`choice`), and
    the pictures kept in `plot_dir`."""
    from shardtrain.files import write_text_atomic
    from shardtrain.report.html import build_html, collect_documents

    intro = summary_html(facts)
    if growth:
        from shardtrain.demo.growth import growth_html

        intro += growth_html(growth)
    write_text_atomic(out_html, build_html(collect_documents([folder]), title,
                                           plot_dir=plot_dir, intro_html=intro,
                                           survey_plan=choice))


def summary_facts(r: "DemoResult", settings_doc: dict) -> list[tuple[str, str]]:
    from shardtrain.units import human_bytes

    c, p = r.check, r.choice
    facts = [
        ("network", f"{r.graph['vertices']:,} depots, {r.graph['edges']:,} routes, "
                    f"{r.graph['classes']} roles, {r.graph['features']} features"),
        ("chosen plan", f"{p['method']} on {p['workers']} workers: {p['reason']}"),
        ("training", f"{settings_doc['epochs']} epochs, {settings_doc['layers']} layers, "
                     f"{settings_doc['hidden']} hidden, dropout {settings_doc['dropout']:g}, "
                     f"lr {settings_doc['lr']:g}, weight decay {settings_doc['weight_decay']:g} "
                     f"(Kipf & Welling 2017), {settings_doc['dtype']}"),
        ("test accuracy", f"{accuracy_text(r.final.get('test_acc'))} (chance: majority role "
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
    if r.growth:
        from shardtrain.demo.growth import growth_facts

        facts.extend(growth_facts(r.growth))
    facts.append(("time until this report", f"{r.total_s:.1f} s on this machine (" + ", ".join(
        f"{k} {v:.1f} s" for k, v in r.seconds.items()) + ")"))
    return facts


def accuracy_text(v) -> str:
    return "-" if v is None else f"{v:.3f}"
