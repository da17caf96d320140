"""The HTML report: one self-contained page with the tables and pictures of a survey, a
training run and/or a forecast.

Self-contained means: inline CSS, PNGs embedded as base64 data URIs, no scripts, no links
to anything outside the page. Which kind a JSON is, is read off its keys (`document_kind`).
"""
from __future__ import annotations

import base64
import html
import tempfile
from pathlib import Path
from typing import Any, Callable

from shardtrain.errors import InputError
from shardtrain.units import human_bytes, human_seconds

KINDS = ("survey", "run", "forecast", "sweep")

CSS = """
body { font: 15px/1.45 Georgia, 'DejaVu Serif', serif; color: #1d2330; background: #fbfaf7;
       max-width: 1180px; margin: 2em auto; padding: 0 1.2em; }
h1 { font-size: 1.7em; border-bottom: 3px double #8a7f6a; padding-bottom: .2em; }
h2 { font-size: 1.3em; margin-top: 2.2em; color: #3b3426; }
h3 { font-size: 1.05em; margin-top: 1.4em; color: #5b5140; }
p.note { color: #5c5c5c; font-size: .92em; }
table { border-collapse: collapse; margin: .6em 0 1.2em; font: 13px/1.3 'DejaVu Sans Mono',
        Menlo, Consolas, monospace; }
th { background: #ece6d9; text-align: left; padding: .35em .7em; border-bottom: 2px solid #8a7f6a; }
td { padding: .25em .7em; border-bottom: 1px solid #e2dccf; }
td.num { text-align: right; }
tr.mark td { background: #fff2c4; font-weight: bold; }
figure { margin: 1em 0 1.6em; }
figure img { max-width: 100%; border: 1px solid #e2dccf; background: white; }
figcaption { font-size: .88em; color: #5c5c5c; }
dl.facts { display: grid; grid-template-columns: max-content auto; gap: .15em 1.2em; }
dl.facts dt { color: #5b5140; }
dl.facts dd { margin: 0; }
"""


def document_kind(doc) -> str | None:
    """'survey', 'run' or 'forecast' by the keys a JSON has; None when it is none of these."""
    if not isinstance(doc, dict):
        return None
    if doc.get("kind") in KINDS:
        return doc["kind"]
    plans = doc.get("plans")
    if isinstance(plans, list) and plans and isinstance(plans[0], dict):
        if "link_gbps" in plans[0] and "epoch_s" in plans[0]:
            return "forecast"
        if "shards" in plans[0] and "traffic" in plans[0]:
            return "survey"
    if isinstance(doc.get("epochs"), list) or (isinstance(doc.get("workers"), list)
                                               and "traffic" in doc):
        return "run"
    return None


def read_document(path) -> tuple[str, dict]:
    """(kind, dict) of a JSON file, checked against the shape of its kind
    (`shardtrain.documents`); InputError naming the file (and key) when it is not one we
    know or does not have that shape."""
    path = Path(path)
    kind, doc = _parse(path)
    if kind is None:
        raise InputError(f"{path}:1: neither a survey, a run nor a forecast JSON")
    return kind, doc


def _parse(path: Path, *, skip_unreadable: bool = False) -> tuple[str | None, Any]:
    """(kind, validated doc), or (None, doc) when the JSON is none of our kinds (or, with
    `skip_unreadable`, not JSON at all). A JSON of our kinds with a bad shape is refused."""
    from shardtrain import documents

    try:
        doc = documents.parse_json_file(path, max_bytes=max(documents.MAX_BYTES[k]
                                                            for k in KINDS))
    except InputError:
        if skip_unreadable:
            return None, None
        raise
    kind = document_kind(doc)
    return (None, doc) if kind is None else (kind, documents.validate(doc, kind, path))


def _graph_facts(doc: dict) -> dict:
    """What a survey, run or forecast JSON says of its graph: fingerprint, vertices, edges
    (the keys that are there; num_* in run JSONs written before rundoc)."""
    g = doc.get("graph") or {}
    facts = {"fingerprint": g.get("structure_fingerprint"),
             "vertices": g.get("vertices", g.get("num_vertices")),
             "edges": g.get("edges", g.get("num_edges"))}
    return {k: v for k, v in facts.items() if v is not None}


def check_same_graph(documents: list[tuple[str, str, dict]]) -> None:
    """Refuse documents of different graphs on one page: compare the fingerprint when both
    carry one, else the vertex and edge counts both carry."""
    first = None
    for name, kind, doc in documents:
        facts = _graph_facts(doc)
        if first is None:
            first = (name, kind, facts)
            continue
        fname, fkind, ffacts = first
        keys = ["fingerprint"] if "fingerprint" in facts and "fingerprint" in ffacts \
            else [k for k in ("vertices", "edges") if k in facts and k in ffacts]
        for key in keys:
            if facts[key] != ffacts[key]:
                raise InputError(f"{name}: a {kind} JSON of another graph than the {fkind} "
                                 f"JSON {fname} ({key} {facts[key]} against {ffacts[key]}); "
                                 f"give documents of one graph")


def collect_documents(paths) -> list[tuple[str, str, dict]]:
    """(name, kind, doc) for each JSON given, and for the JSONs inside each folder given
    (files that are none of the three kinds are skipped there). Surveys first, then runs,
    then forecasts, as the work flows."""
    found = []
    for p in map(Path, paths):
        if p.is_dir():
            for f in sorted(p.glob("*.json")):
                kind, doc = _parse(f, skip_unreadable=True)   # other files are skipped
                if kind is not None:
                    found.append((f.name, kind, doc))
        elif p.exists():
            kind, doc = read_document(p)
            found.append((p.name, kind, doc))
        else:
            raise InputError(f"{p}: no such file or folder")
    if not found:
        raise InputError(f"{', '.join(map(str, paths))}: no survey, run or forecast JSON found")
    found.sort(key=lambda t: KINDS.index(t[1]))
    check_same_graph(found)
    return found


# ---------------------------------------------------------------- HTML pieces

def _esc(v) -> str:
    return html.escape(str(v), quote=True)


def _table(rows: list[dict], columns: list[tuple], mark_key: str | None = None) -> str:
    """columns: (key, header, fmt callable or None). Numbers are right-aligned."""
    out = ["<table><thead><tr>"]
    out += [f"<th>{_esc(h)}</th>" for _, h, _ in columns]
    out.append("</tr></thead><tbody>")
    for r in rows:
        cls = ' class="mark"' if mark_key and r.get(mark_key) else ""
        out.append(f"<tr{cls}>")
        for key, _, fmt in columns:
            v = r.get(key)
            text = "-" if v is None else (fmt(v) if fmt else str(v))
            num = isinstance(v, (int, float)) and not isinstance(v, bool)
            out.append(f'<td{" class=num" if num else ""}>{_esc(text)}</td>')
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _facts(pairs: list[tuple[str, object]]) -> str:
    items = "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in pairs if v is not None)
    return f'<dl class="facts">{items}</dl>'


CAPTIONS = {
    "survey_traffic_heatmap": "Predicted halo payload of one training epoch from each worker "
                              "(row) to each other worker (column), for one plan.",
    "survey_traffic_replication": "Predicted payload of one training epoch (halo exchanges and "
                                  "all-reduce, all workers) and replication factor against "
                                  "the worker count, one line per partition method.",
    "run_worker_times": "Measured wall time of each worker over the whole run. Where workers "
                        "share fewer cores than there are workers, waiting grows with the "
                        "sharing.",
    "run_loss_accuracy": "Training loss and accuracy of every epoch.",
    "run_traffic_heatmap": "Measured payload per epoch from each worker (row) to each other "
                           "worker (column).",
    "forecast_epoch_time": "Forecast time of one training epoch against the worker count, one "
                           "panel per link speed, one line per partition method.",
    "forecast_worker_times": "Forecast split of one training epoch of the fastest plan, per "
                             "worker.",
    "drift": "Payload per training epoch of the updated plan (vertices kept on their "
             "workers, new ones placed by the Fennel score) and of a fresh partition of each "
             "week's network by the same method; labels: the updated plan's excess.",
}


def figures_html(paths: list[str]) -> str:
    """The pictures as embedded <figure>s with their captions (`CAPTIONS` by file stem)."""
    return _figures(paths)


def _figures(paths: list[str]) -> str:
    out = []
    for p in paths:
        data = base64.b64encode(Path(p).read_bytes()).decode("ascii")
        stem = Path(p).stem
        alt = stem.replace("_", " ")
        caption = CAPTIONS.get(stem, alt)
        out.append(f'<figure><img alt="{_esc(alt)}" src="data:image/png;base64,{data}">'
                   f"<figcaption>{_esc(caption)}</figcaption></figure>")
    return "".join(out)


# ---------------------------------------------------------------- sections

def _fmt_int(v) -> str:
    return f"{int(v):,}"


def find_plan(plans: list[dict], plan: dict | None) -> dict | None:
    """The survey plan with the method and worker count of `plan` (e.g. a run's chosen
    plan); None when there is none or `plan` is None."""
    if not plan:
        return None
    return next((p for p in plans if p.get("method") == plan.get("method")
                 and p.get("workers") == plan.get("workers")), None)


def survey_section(doc: dict, plot_dir: Path, plan: dict | None = None) -> str:
    """Facts, the plan table and the pictures; the heat map shows `plan` (method and
    workers of one surveyed plan) when given and surveyed, else `plots.pick_heatmap_plan`."""
    from shardtrain.report.plots import survey_plots

    g, m = doc.get("graph", {}), doc.get("model", {})
    rows = []
    for p in doc["plans"]:
        t, imb = p["traffic"], p.get("imbalance", {})
        rows.append({"method": p["method"], "workers": p["workers"],
                     "edge_cut": p.get("edge_cut"),
                     "replication": p.get("replication_factor"),
                     "halo": imb.get("halo", {}).get("max"),
                     "forward": t.get("forward_bytes"), "backward": t.get("backward_bytes"),
                     "allreduce": t.get("allreduce_bytes"),
                     "memory": p.get("max_memory_bytes"),
                     "owned_imb": imb.get("owned", {}).get("max_over_mean")})
    cols = [("method", "method", None), ("workers", "workers", _fmt_int),
            ("edge_cut", "edge cut", _fmt_int), ("replication", "replication", "{:.3f}".format),
            ("halo", "max halo", _fmt_int), ("forward", "forward/epoch", human_bytes),
            ("backward", "backward/epoch", human_bytes),
            ("allreduce", "all-reduce/epoch", human_bytes),
            ("memory", "max memory/worker", human_bytes),
            ("owned_imb", "owned max/mean", "{:.3f}".format)]
    dims = m.get("dims") or []
    shape = " -> ".join(str(d) for d in ([dims[0][0]] + [d[1] for d in dims])) if dims else None
    return (_facts([("vertices", f"{g.get('vertices', 0):,}"), ("edges", f"{g.get('edges', 0):,}"),
                    ("model", str(m.get("name", "gcn")).upper()
                     + (f" ({m['heads']} heads)" if "heads" in m else "")),
                    ("widths", shape), ("dtype", m.get("dtype"))])
            + '<p class="note">Traffic is predicted payload per training epoch (array bytes, '
              "no framing), summed over all workers.</p>"
            + _table(rows, cols)
            + _figures(survey_plots(doc, plot_dir, plan=find_plan(doc["plans"], plan))))


def run_section(doc: dict, plot_dir: Path) -> str:
    from shardtrain.report.plots import run_plots

    s, g, t = doc.get("settings", {}), doc.get("graph", {}), doc.get("traffic", {})
    epochs = doc.get("epochs") or []
    vertices = g.get("vertices", g.get("num_vertices"))   # num_*: run JSONs before rundoc
    edges = g.get("edges", g.get("num_edges"))
    facts = [("graph", g.get("source")),
             ("vertices", f"{vertices:,}" if vertices is not None else None),
             ("edges", f"{edges:,}" if edges is not None else None),
             ("mode", doc.get("mode")),
             ("workers", len(doc["workers"]) if doc.get("workers") else None),
             # a run JSON written before the model family trained GCN
             ("model", str(s.get("model", "gcn")).upper()
              + (f" ({s['heads']} heads)" if s.get("model") == "gat" and "heads" in s else ""))]
    facts += [(label, s[k]) for k, label in (
        ("method", "method"), ("layers", "layers"), ("hidden", "hidden width"),
        ("dtype", "dtype"), ("epochs", "epochs"), ("lr", "learning rate"),
        ("dropout", "dropout"), ("weight_decay", "weight decay (first layer)"),
        ("link", "link")) if k in s]
    if "measured_payload_bytes" in t:
        facts.append(("measured payload", human_bytes(t["measured_payload_bytes"])
                      + f" ({t['measured_payload_bytes']:,} bytes)"))
    if "predicted_payload_bytes" in t:
        facts.append(("predicted payload", human_bytes(t["predicted_payload_bytes"])
                      + f" ({t['predicted_payload_bytes']:,} bytes)"))
    if epochs:
        last = epochs[-1]
        acc = last.get("test_acc")
        facts.append(("final test accuracy", "-" if acc is None else f"{acc:.4f}"))
        times = sorted(e["epoch_s"] for e in epochs if e.get("epoch_s") is not None)
        if times:
            facts.append(("median epoch", human_seconds(times[len(times) // 2])))
    out = [_facts(facts)]
    if epochs:
        step = max(1, len(epochs) // 12)
        shown = epochs[::step]
        if shown[-1] is not epochs[-1]:
            shown.append(epochs[-1])
        out.append("<h3>epochs</h3>")
        out.append(_table(shown, [("epoch", "epoch", str), ("loss", "loss", "{:.4f}".format),
                                  ("train_acc", "train acc", "{:.3f}".format),
                                  ("val_acc", "val acc", "{:.3f}".format),
                                  ("test_acc", "test acc", "{:.3f}".format),
                                  ("epoch_s", "epoch time", human_seconds)]))
    workers = doc.get("workers") or []
    if workers:
        out.append("<h3>workers (whole run)</h3>")
        out.append(_table(workers, [
            ("worker", "worker", str), ("compute_s", "compute", human_seconds),
            ("exchange_s", "exchange", human_seconds), ("allreduce_s", "all-reduce", human_seconds),
            ("wait_s", "wait", human_seconds), ("cpu_s", "CPU", human_seconds),
            ("bytes_sent", "sent", human_bytes), ("bytes_received", "received", human_bytes),
            ("peak_rss_bytes", "peak memory", human_bytes)]))
    out.append(_figures(run_plots(doc, plot_dir)))
    return "".join(out)


def _money(v) -> str:
    return "-" if v is None else f"{v:.4g}"


def forecast_specs_section(doc: dict, plot_dir: Path) -> str:
    """A forecast on described workers (`forecast --worker-spec`): the answer first (per
    worker kind the fewest workers meeting the target and its price; the cheapest plan
    meeting it), then every plan with its memory fit and price."""
    from shardtrain.report.plots import forecast_plots

    target = doc.get("target_epoch_s")
    facts = [("worker specs", doc.get("worker_spec_file")),
             ("target epoch", human_seconds(target) if target else None),
             ("receiver contention", "modelled" if doc.get("receiver_contention") else None)]
    answer: list[tuple[str, object]] = []
    for s in doc.get("per_spec", []):
        m = s.get("fewest_meeting_target") if target else s.get("fastest")
        if s.get("plans_fitting_memory") == 0:
            text = "no plan fits in its memory"
        elif m is None:
            text = f"no plan meets {human_seconds(target)}"
        else:
            text = (f"{m['workers']} workers ({m['method']}), {human_seconds(m['epoch_s'])}"
                    f" per epoch" + ("" if m.get("price_per_epoch") is None else
                                     f", {_money(m['price_per_epoch'])} per epoch, "
                                     f"{_money(m['price_per_100_epochs'])} per 100 epochs"))
        answer.append((f"{s['spec']}: " + ("fewest meeting target" if target else "fastest"),
                       text))
    c = doc.get("cheapest_meeting_target")
    if target:
        answer.append(("cheapest meeting target",
                       f"{c['workers']} x {c['spec']} ({c['method']}), "
                       f"{human_seconds(c['epoch_s'])}, {_money(c['price_per_epoch'])} per "
                       f"epoch, {_money(c['price_per_100_epochs'])} per 100 epochs"
                       if c else "none (no plan meets it, or no price given)"))
    rows = []
    for p in doc["plans"]:
        marks = []
        if p.get("fits_memory") is False:
            marks.append("does not fit in memory")
        for key, word in (("fastest", "fastest"), ("fewest_meeting_target",
                                                   "fewest meeting target"),
                          ("cheapest_meeting_target", "cheapest meeting target")):
            if p.get(key):
                marks.append(word)
        mem = p.get("memory_bytes")
        rows.append(dict(p, mark=", ".join(m for m in marks),
                         marked=bool(marks) and p.get("fits_memory") is not False,
                         memory="-" if mem is None else
                         f"{human_bytes(mem)} of {human_bytes(p['memory_limit_bytes'])}",
                         price=_money(p.get("price_per_epoch")),
                         price_100=_money(p.get("price_per_100_epochs"))))
    cols = [("spec", "worker", None), ("method", "method", None),
            ("workers", "workers", _fmt_int), ("epoch_s", "epoch", human_seconds),
            ("compute_s", "compute", human_seconds), ("exchange_s", "exchange", human_seconds),
            ("allreduce_s", "all-reduce", human_seconds), ("memory", "memory/worker", None),
            ("price", "price/epoch", None), ("price_100", "per 100 epochs", None),
            ("mark", "", None)]
    return (_facts(facts) + "<h3>The answer</h3>" + _facts(answer)
            + '<p class="note">Compute: each kernel on the worker\'s roofline, max(bytes / '
              "achieved bandwidth, flops / achieved flop rate) + a per-call cost, the "
              "efficiencies calibrated on the machine that ran the forecast. A hop: the "
              "slowest worker's latency + max(bytes sent, bytes received) x 8 / bandwidth. "
              "A plan whose predicted peak memory per worker exceeds the worker's memory "
              "(its accelerator's, when it has one) is never chosen.</p>"
            + _table(rows, cols, mark_key="marked") + _figures(forecast_plots(doc, plot_dir)))


def forecast_section(doc: dict, plot_dir: Path) -> str:
    from shardtrain.report.plots import forecast_plots

    if doc.get("per_spec") is not None:
        return forecast_specs_section(doc, plot_dir)
    rows = []
    for p in doc["plans"]:
        marks = []
        if p.get("fastest"):
            marks.append("fastest")
        if p.get("fewest_meeting_target"):
            marks.append("fewest workers meeting target")
        bound = {"allreduce": "all-reduce", "exchange": "halo exchange"}.get(
            p.get("bottleneck"), p.get("bottleneck"))
        rows.append(dict(p, link=f"{p['link_gbps']:g} Gbit/s", mark=", ".join(marks),
                         marked=bool(marks), bottleneck=bound))
    cols = [("method", "method", None), ("workers", "workers", _fmt_int),
            ("link", "link", None), ("epoch_s", "epoch", human_seconds),
            ("compute_s", "compute", human_seconds), ("exchange_s", "exchange", human_seconds),
            ("allreduce_s", "all-reduce", human_seconds), ("wait_s", "wait (mean)", human_seconds),
            ("eval_s", "+eval", human_seconds), ("bottleneck", "bound by", None),
            ("mark", "", None)]
    target = doc.get("target_epoch_s")
    facts = [("latency", f"{doc.get('latency_us', 0):g} us"),
             ("speed factor", doc.get("speed_factor")),
             ("target epoch", human_seconds(target) if target else None),
             ("cores shared", doc.get("cores"))]
    f = doc.get("fastest")
    if f:
        facts.append(("fastest", f"{f['method']}, {f['workers']} workers, "
                                 f"{f['link_gbps']:g} Gbit/s: {human_seconds(f['epoch_s'])}"))
    m = doc.get("fewest_meeting_target")
    if target:
        facts.append(("fewest meeting target", f"{m['method']}, {m['workers']} workers, "
                                               f"{m['link_gbps']:g} Gbit/s: "
                                               f"{human_seconds(m['epoch_s'])}" if m else "none"))
    return (_facts(facts)
            + '<p class="note">Epoch: the critical path of one training step (forward, loss, '
              "backward, all-reduce, Adam step). +eval: the evaluation forward, not included. "
              "Wait: mean time a worker waits for the slowest at the exchanges.</p>"
            + _table(rows, cols, mark_key="marked") + _figures(forecast_plots(doc, plot_dir)))


def sweep_section(doc: dict, plot_dir: Path) -> str:
    """A `shardtrain sweep`'s rows: each halo scheme against the exact one."""
    from shardtrain.report.plots import scheme_label, sweep_plots

    def points(v):
        return "" if v is None else f"{v:+.1f}"

    def ratio(v):
        return "" if v is None else f"{v:.3f}"

    rows = [dict(r, label=scheme_label(r["scheme"]),
                 payload_ratio=ratio(r.get("halo_payload_ratio")),
                 time_ratio=ratio(r.get("epoch_s_ratio")),
                 final_points=points(r.get("final_test_acc_points")),
                 best_points=points(r.get("test_acc_at_best_val_points")))
            for r in doc["rows"]]
    cols = [("label", "scheme", None), ("halo_payload_per_epoch", "halo/epoch", human_bytes),
            ("payload_ratio", "x exact", None), ("epoch_s", "epoch", human_seconds),
            ("time_ratio", "x exact", None),
            ("final_test_acc", "test acc", lambda v: "" if v is None else f"{v:.3f}"),
            ("final_points", "points", None),
            ("test_acc_at_best_val", "test @ best val",
             lambda v: "" if v is None else f"{v:.3f}"), ("best_points", "points", None)]
    facts = [("workers", doc.get("workers")), ("method", doc.get("method")),
             ("epochs", doc.get("epochs")), ("emulated link", doc.get("emulated_link"))]
    return (_facts(facts)
            + '<p class="note">Each halo scheme trained in turn; halo payload: the measured '
              "training exchanges (forward and backward) per epoch, equal to the survey's "
              "prediction; epoch: the median measured training step; accuracy points "
              "against the exact scheme.</p>"
            + _table(rows, cols) + _figures(sweep_plots(doc, plot_dir)))


SECTIONS: dict[str, tuple[str, Callable[..., str]]] = {   # survey's takes the plan too
    "survey": ("Survey of partition plans", survey_section),
    "run": ("Training run", run_section),
    "forecast": ("Forecast", forecast_section),
    "sweep": ("Halo schemes compared", sweep_section)}


def run_plan(documents: list[tuple[str, str, dict]]) -> dict | None:
    """The plan a run document says it trained ({"method", "workers", ...}; the demo's
    run.json has one), for the survey's heat map; None when no run names one."""
    for _, kind, doc in documents:
        plan = doc.get("plan") if kind == "run" else None
        if isinstance(plan, dict) and "method" in plan and "workers" in plan:
            return plan
    return None


def build_html(documents: list[tuple[str, str, dict]], title: str = "shardtrain report", *,
               plot_dir=None, intro_html: str = "", survey_plan: dict | None = None) -> str:
    """The page for (name, kind, doc) triples. Pictures are drawn into `plot_dir` (kept;
    a second document of a kind draws into a subfolder named after it) or, when None, into
    a temporary folder. `intro_html` goes right after the title. The survey's heat map
    shows `survey_plan` (method and workers), by default the plan a run document names."""
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{_esc(title)}</title><style>{CSS}</style></head><body>",
             f"<h1>{_esc(title)}</h1>", intro_html]
    plan = survey_plan if survey_plan is not None else run_plan(documents)
    with tempfile.TemporaryDirectory(prefix="shardtrain-report-") as tmp:
        root = Path(plot_dir) if plot_dir is not None else Path(tmp)
        seen: set[str] = set()
        for i, (name, kind, doc) in enumerate(documents):
            heading, section = SECTIONS[kind]
            if plot_dir is None:
                where = root / f"{i}"
            else:
                where = root / Path(name).stem if kind in seen else root
            seen.add(kind)
            where.mkdir(parents=True, exist_ok=True)
            parts.append(f"<h2>{_esc(heading)} <small>({_esc(name)})</small></h2>")
            parts.append(section(doc, where, plan) if kind == "survey"
                         else section(doc, where))
    parts.append("</body></html>")
    return "\n".join(p for p in parts if p) + "\n"


def write_report(paths, out_html) -> list[tuple[str, str]]:
    """Write the report of the JSONs (or folders of them) to out_html, atomically.
    Returns (name, kind) of what went in."""
    from shardtrain.files import write_text_atomic

    docs = collect_documents(paths)
    write_text_atomic(out_html, build_html(docs))
    return [(name, kind) for name, kind, _ in docs]
