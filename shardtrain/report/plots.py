"""PNG pictures of a survey, a training run and a forecast (matplotlib, headless Agg).

Each function takes the JSON-ready dict the matching command writes and a folder, writes its
PNGs there atomically, and returns their paths. Pictures a dict has no data for are skipped.
"""
from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.artist import Artist  # noqa: E402
from matplotlib.colors import LogNorm, Normalize  # noqa: E402
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, MultipleLocator, NullFormatter  # noqa: E402

from shardtrain.errors import ParameterError  # noqa: E402
from shardtrain.files import atomic_output  # noqa: E402

PHASES = (("compute_s", "compute", "#4c72b0"), ("exchange_s", "halo exchange", "#dd8452"),
          ("allreduce_s", "all-reduce", "#55a868"), ("wait_s", "waiting", "#c7c7c7"))
DPI = 110
_UNITS = ("B", "KiB", "MiB", "GiB", "TiB")


def _bytes_tick(v: float, _pos=None) -> str:
    """Axis tick in binary units without padding zeros: 512 B, 8 KiB, 1 MiB, 1.5 MiB."""
    if v <= 0:
        return "0"
    i = min(int(np.log2(v) // 10), len(_UNITS) - 1) if v >= 1 else 0
    return f"{v / 1024 ** i:.3g} {_UNITS[i]}"


_BYTES_FMT = FuncFormatter(_bytes_tick)


def check_plot_dir(path, param: str = "plot") -> None:
    """Before any work: the picture folder may exist (as a folder) or be new in an
    existing folder; ParameterError naming `param` otherwise."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise ParameterError(param, "exists and is not a folder", value=path)
    if not p.exists() and not p.absolute().parent.is_dir():
        raise ParameterError(param, f"folder {p.absolute().parent} does not exist", value=path)


def _log_bytes_axis(axis) -> None:
    """Byte ticks at powers of two (1 KiB, 4 KiB, 16 KiB ...): round binary labels."""
    axis.set_major_locator(LogLocator(base=2, numticks=8))
    axis.set_major_formatter(_BYTES_FMT)
    axis.set_minor_formatter(NullFormatter())


def _linear_bytes_axis(axis, vmax: float) -> None:
    """Byte ticks at multiples of a power of two (0, 8 KiB, 16 KiB ...), about 3 to 6."""
    step = 2.0 ** np.ceil(np.log2(max(vmax, 1.0) / 6))
    axis.set_major_locator(MultipleLocator(step))
    axis.set_major_formatter(_BYTES_FMT)


def _log_seconds_axis(axis) -> None:
    """Time ticks at 1, 2 and 5 times powers of ten, labelled in s, ms or us."""
    axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0), numticks=12))
    axis.set_major_formatter(FuncFormatter(_seconds_label))
    axis.set_minor_formatter(NullFormatter())


def _save(fig, out_dir, name: str) -> str:
    path = Path(out_dir) / name
    with atomic_output(path) as tmp:
        fig.savefig(tmp, dpi=DPI, format="png")
    plt.close(fig)
    return str(path)


def _seconds_label(v: float, _pos=None) -> str:
    if v == 0:
        return "0"
    if abs(v) >= 1:
        return f"{v:g} s"
    if abs(v) >= 1e-3:
        return f"{v * 1e3:g} ms"
    return f"{v * 1e6:g} us"


def _worker_ticks(ax, k: int, axis: str = "x") -> None:
    """Readable worker ticks: every worker up to 16, otherwise about 16 evenly spaced."""
    step = 1 if k <= 16 else int(np.ceil(k / 16))
    ticks = np.arange(0, k, step)
    (ax.set_xticks if axis == "x" else ax.set_yticks)(ticks)


def _workers_axis(ax, counts) -> None:
    """Worker counts on a log2 axis labelled with the counts themselves."""
    counts = sorted(set(int(c) for c in counts))
    if len(counts) > 1 and counts[0] > 0:
        ax.set_xscale("log", base=2)
    ax.set_xticks(counts)
    ax.set_xticklabels([str(c) for c in counts])
    ax.minorticks_off()
    ax.set_xlabel("workers")


# One look per method, the same in every picture; marker and dash differ too, so that
# methods whose lines coincide (random and range often do) stay visible one over another.
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "*")
_DASHES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (3, 1, 1, 1, 1, 1)))


def method_styles(methods) -> dict[str, dict]:
    """{method: plot keywords} for the methods in the order given."""
    cmap = plt.get_cmap("tab10")
    styles = {}
    for i, m in enumerate(dict.fromkeys(methods)):
        styles[m] = {"color": cmap(i % 10), "marker": _MARKERS[i % len(_MARKERS)],
                     "linestyle": _DASHES[i % len(_DASHES)], "markersize": 8 - 0.6 * (i % 5),
                     "markerfacecolor": "none" if i % 2 else cmap(i % 10),
                     "markeredgewidth": 1.5, "linewidth": 1.6}
    return styles


# ---------------------------------------------------------------- heat map

def traffic_heatmap(pair_bytes, title: str, out_dir, name: str) -> str:
    """k x k bytes sent from row worker to column worker; no traffic shows white."""
    m = np.asarray(pair_bytes, dtype=np.float64)
    k = m.shape[0]
    side = 4.2 + min(k, 64) * 0.04
    fig, ax = plt.subplots(figsize=(side + 1.4, side))
    positive = m[m > 0]
    cmap = plt.get_cmap("viridis").with_extremes(bad="white")
    if positive.size == 0:
        norm = Normalize(0, 1)
    elif positive.max() / positive.min() > 50:
        norm = LogNorm(positive.min(), positive.max())
    else:
        norm = Normalize(0, positive.max())
    img = ax.imshow(np.ma.masked_where(m <= 0, m), cmap=cmap, norm=norm,
                    interpolation="nearest", origin="upper")
    _worker_ticks(ax, k, "x")
    _worker_ticks(ax, k, "y")
    if k > 16:
        ax.tick_params(labelsize=8)
    ax.set_xlabel("receiving worker")
    ax.set_ylabel("sending worker")
    ax.set_title(title, fontsize=10)
    bar = fig.colorbar(img, ax=ax, fraction=0.046, pad=0.04)
    if isinstance(norm, LogNorm):
        _log_bytes_axis(bar.ax.yaxis)
    else:
        assert norm.vmax is not None         # both Normalize(...) above give a vmax
        _linear_bytes_axis(bar.ax.yaxis, norm.vmax)
    bar.set_label("payload per epoch (white: none)")
    fig.tight_layout()
    return _save(fig, out_dir, name)


# ---------------------------------------------------------------- per-worker time bars

def time_bars(workers: list[dict], title: str, out_dir, name: str) -> str:
    """Stacked bars per worker: compute / halo exchange / all-reduce / waiting."""
    workers = sorted(workers, key=lambda w: w["worker"])
    k = len(workers)
    x = np.arange(k)
    fig, ax = plt.subplots(figsize=(max(5.5, 0.35 * min(k, 64) + 3), 4))
    bottom = np.zeros(k)
    for key, label, colour in PHASES:
        # a phase cannot take negative time (a clock read out of order); draw it as none
        v = np.clip([float(w.get(key) or 0.0) for w in workers], 0.0, None)
        ax.bar(x, v, bottom=bottom, color=colour, label=label, width=0.75)
        bottom += v
    ax.set_xticks(x if k <= 16 else x[:: int(np.ceil(k / 16))])
    ax.set_xlim(-0.6, k - 0.4)
    ax.set_xlabel("worker")
    ax.set_ylabel("time")
    ax.yaxis.set_major_formatter(FuncFormatter(_seconds_label))
    ax.set_title(title, fontsize=10)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=9, frameon=False)
    ax.set_ylim(0, max(bottom.max() * 1.1, 1e-9))
    fig.tight_layout()
    return _save(fig, out_dir, name)


# ---------------------------------------------------------------- survey

def _by_method(plans: list[dict]) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for p in plans:
        out.setdefault(p["method"], []).append(p)
    return {m: sorted(ps, key=lambda p: p["workers"]) for m, ps in out.items()}


def _plan_traffic(plan: dict) -> float:
    t = plan["traffic"]
    return float(t["forward_bytes"] + t["backward_bytes"] + t["allreduce_bytes"])


def pick_heatmap_plan(plans: list[dict], max_workers: int = 64) -> dict | None:
    """The plan to draw as a heat map: the most workers (up to max_workers), and among
    those the least traffic."""
    fit = [p for p in plans if 1 < p["workers"] <= max_workers and "pair_bytes" in p["traffic"]]
    if not fit:
        return None
    k = max(p["workers"] for p in fit)
    return min((p for p in fit if p["workers"] == k), key=_plan_traffic)


def survey_plots(survey: dict, out_dir, plan: dict | None = None) -> list[str]:
    """Traffic heat map of one plan; traffic and replication factor against workers."""
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    paths = []
    plans = survey["plans"]
    chosen = plan or pick_heatmap_plan(plans)
    if chosen is not None:
        paths.append(traffic_heatmap(
            chosen["traffic"]["pair_bytes"],
            f"predicted halo traffic per training epoch, {chosen['method']} on "
            f"{chosen['workers']} workers",
            out_dir, "survey_traffic_heatmap.png"))
    groups = _by_method(plans)
    styles = method_styles(groups)
    counts = [p["workers"] for p in plans]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(10, 4))
    for method, ps in groups.items():
        k = [p["workers"] for p in ps]
        ax1.plot(k, [max(_plan_traffic(p), 1.0) for p in ps], label=method, **styles[method])
        ax2.plot(k, [p["replication_factor"] for p in ps], label=method, **styles[method])
    for ax in (ax1, ax2):
        _workers_axis(ax, counts)
        ax.grid(True, which="major", alpha=0.3)
    ax1.set_yscale("log")
    _log_bytes_axis(ax1.yaxis)
    traffic = [max(_plan_traffic(p), 1.0) for p in plans]
    # limits at powers of two, so the highest and lowest lines sit between labelled ticks
    ax1.set_ylim(2.0 ** np.floor(np.log2(min(traffic))), 2.0 ** np.ceil(np.log2(max(traffic))))
    ax1.set_ylabel("payload per training epoch (all workers)")
    ax1.set_title("traffic per epoch", fontsize=10)
    ax2.set_ylabel("replication factor ((owned + halo) / vertices)")
    ax2.set_title("replication factor", fontsize=10)
    ax2.legend(title="method", fontsize=9)
    fig.tight_layout()
    paths.append(_save(fig, out_dir, "survey_traffic_replication.png"))
    return paths


# ---------------------------------------------------------------- run

def measured_pair_bytes(run: dict) -> tuple[np.ndarray | None, str]:
    """(k x k payload bytes the run measured, what they cover). Halo exchanges only when the
    run lists its counters per (src, dst, kind, ...); else the whole per-pair matrix."""
    traffic = run.get("traffic") or {}
    k = len(run.get("workers") or [])
    rows = traffic.get("breakdown")
    if isinstance(rows, list) and rows and k:
        m = np.zeros((k, k))
        for r in rows:
            if not isinstance(r, dict) or r.get("kind") != "halo":
                continue
            src, dst = r.get("src"), r.get("dst")
            nbytes = r.get("measured_payload_bytes", r.get("payload_bytes"))
            if isinstance(src, int) and isinstance(dst, int) and nbytes is not None \
                    and 0 <= src < k and 0 <= dst < k:
                m[src, dst] += nbytes
        if m.any():
            return m, "halo exchanges of training and of the evaluation forward"
    for where in (traffic, run.get("profile") or {}):
        for key in ("measured_pair_bytes", "pair_payload_bytes", "pair_bytes"):
            if key in where:
                return np.asarray(where[key], dtype=np.float64), "halo and all-reduce"
    return None, ""


def run_plots(run: dict, out_dir) -> list[str]:
    """Per-worker time bars, loss and accuracy curves, measured traffic heat map."""
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    paths = []
    workers = run.get("workers") or []
    if workers:
        paths.append(time_bars(workers, f"measured wall time per worker over the run "
                                        f"({len(workers)} workers)", out_dir,
                               "run_worker_times.png"))
    epochs = run.get("epochs") or []
    if epochs:
        e = [r["epoch"] for r in epochs]
        fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(10, 3.8))
        ax1.plot(e, [r["loss"] for r in epochs], color="#4c72b0",
                 label="training (cross-entropy + weight decay)")
        val = [r.get("val_loss") for r in epochs]
        if any(v is not None for v in val):     # runs written before val_loss have none
            ax1.plot(e, [np.nan if v is None else v for v in val], color="#dd8452",
                     label="validation (cross-entropy)")
        best = (run.get("early_stop") or {}).get("best_epoch")
        if best is not None:
            ax1.axvline(best, color="grey", linestyle=":", label=f"best epoch {best}")
        ax1.set_xlabel("epoch")
        ax1.set_ylabel("loss")
        ax1.legend(fontsize=8)
        ax1.set_title("loss", fontsize=10)
        for key, label in (("train_acc", "training"), ("val_acc", "validation"),
                           ("test_acc", "test")):
            vals = [r.get(key) for r in epochs]
            if any(v is not None for v in vals):
                ax2.plot(e, [np.nan if v is None else v for v in vals], label=label)
        ax2.set_ylim(0, 1.02)
        ax2.set_xlabel("epoch")
        ax2.set_ylabel("accuracy")
        ax2.set_title("accuracy", fontsize=10)
        ax2.legend(fontsize=9)
        for ax in (ax1, ax2):
            ax.grid(True, alpha=0.3)
            ax.xaxis.set_major_locator(MaxNLocator(integer=True, steps=[1, 2, 5, 10]))
        fig.tight_layout()
        paths.append(_save(fig, out_dir, "run_loss_accuracy.png"))
    pair, what = measured_pair_bytes(run)
    if pair is not None and pair.ndim == 2 and pair.shape[0] > 1:
        n_epochs = max(len(epochs), 1)
        paths.append(traffic_heatmap(pair / n_epochs,
                                     f"measured traffic per epoch\n({what})",
                                     out_dir, "run_traffic_heatmap.png"))
    return paths


# ---------------------------------------------------------------- forecast

def forecast_plots(forecast: dict, out_dir) -> list[str]:
    """Forecast epoch time against workers, one panel per link speed, one line per method;
    and the per-worker split of the fastest plan."""
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    plans = forecast["plans"]
    paths: list[str] = []
    if not plans:
        return paths
    # one panel per link speed; per described worker kind when the forecast has them
    def panel(p):
        return p.get("spec") or p["link_gbps"]

    links = list(dict.fromkeys(panel(p) for p in plans)) if plans[0].get("spec") \
        else sorted({p["link_gbps"] for p in plans})
    methods = list(dict.fromkeys(p["method"] for p in plans))
    styles = method_styles(methods)
    n = len(links)
    cols = min(n, 4)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(3.4 * cols + 1.2, 3.3 * rows + 0.4),
                             sharey=True, squeeze=False)
    epochs = [p["epoch_s"] for p in plans if p["epoch_s"] > 0]
    lo, hi = (min(epochs), max(epochs)) if epochs else (1e-3, 1)
    target = forecast.get("target_epoch_s")
    for i, g in enumerate(links):
        ax = axes[i // cols][i % cols]
        for m in methods:
            ps = sorted((p for p in plans if panel(p) == g and p["method"] == m),
                        key=lambda p: p["workers"])
            if ps:
                ax.plot([p["workers"] for p in ps], [p["epoch_s"] for p in ps], label=m,
                        **styles[m])
        for p in plans:
            if panel(p) == g and p.get("fastest"):
                ax.plot(p["workers"], p["epoch_s"], marker="*", markersize=16, color="gold",
                        markeredgecolor="black", linestyle="none", label="fastest")
            if panel(p) == g and p.get("fewest_meeting_target"):
                ax.plot(p["workers"], p["epoch_s"], marker="D", markersize=11,
                        markerfacecolor="none", markeredgecolor="crimson",
                        markeredgewidth=2, linestyle="none",
                        label="fewest workers meeting target")
        if target:
            ax.axhline(target, color="crimson", linestyle="--", linewidth=1,
                       label=f"target {_seconds_label(target)}")
        ax.set_yscale("log")
        ax.set_ylim(lo / 1.5, max(hi, target or 0) * 1.5)
        _log_seconds_axis(ax.yaxis)
        _workers_axis(ax, [p["workers"] for p in plans])
        ax.set_title(f"link {g:g} Gbit/s" if isinstance(g, float) else str(g), fontsize=10)
        ax.grid(True, which="major", alpha=0.3)
        if i % cols == 0:
            ax.set_ylabel("forecast time of one training epoch")
    for j in range(n, rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    handles: dict[str, Artist] = {}
    for ax in axes.flat:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            handles.setdefault(lab, h)
    fig.legend(list(handles.values()), list(handles.keys()), loc="lower center",
               ncol=min(len(handles), 6), fontsize=9, frameon=False)
    lat = forecast.get("latency_us")
    fig.suptitle(f"forecast epoch time (latency {lat:g} us, speed factor "
                 f"{forecast.get('speed_factor', 1):g})" if lat is not None
                 else "forecast epoch time", fontsize=11)
    fig.tight_layout(rect=(0, 0.08, 1, 1))
    paths.append(_save(fig, out_dir, "forecast_epoch_time.png"))
    fastest = next((p for p in plans if p.get("fastest")), None)
    if fastest and fastest.get("per_worker"):
        paths.append(time_bars(fastest["per_worker"],
                               f"forecast epoch per worker: {fastest['method']}, "
                               f"{fastest['workers']} workers, {fastest['link_gbps']:g} Gbit/s",
                               out_dir, "forecast_worker_times.png"))
    return paths


def scheme_label(scheme: dict) -> str:
    """'keep 0.1, int8' for a sweep row's scheme; 'exact' when every setting is default."""
    parts = []
    if scheme.get("halo_keep", 1.0) != 1.0:
        parts.append(f"keep {scheme['halo_keep']:g}")
    if scheme.get("halo_format") is not None:
        parts.append(str(scheme["halo_format"]))
    if scheme.get("halo_stale"):
        parts.append("stale")
    parts += [f"{k} {v}" for k, v in scheme.items()
              if k not in ("halo_keep", "halo_format", "halo_stale")]
    return ", ".join(parts) or "exact"


def sweep_plots(doc: dict, out_dir) -> list[str]:
    """A sweep's test accuracy against halo payload per epoch, and its epoch time against
    halo payload per epoch: one point per scheme, labelled."""
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    rows = doc["rows"]
    paths: list[str] = []
    if not rows:
        return paths
    x = [max(r["halo_payload_per_epoch"], 1.0) for r in rows]
    for key, ylabel, name in (
            ("final_test_acc", "final test accuracy", "sweep_accuracy.png"),
            ("epoch_s", "measured time of one training epoch", "sweep_epoch_time.png")):
        fig, ax = plt.subplots(figsize=(6.2, 4.2))
        y = [np.nan if r[key] is None else r[key] for r in rows]
        ax.scatter(x, y, color="#4c72b0", zorder=3)
        for xi, yi, r in zip(x, y, rows):
            ax.annotate(scheme_label(r["scheme"]), (xi, yi), textcoords="offset points",
                        xytext=(5, 4), fontsize=8)
        ax.set_xscale("log")
        _log_bytes_axis(ax.xaxis)
        if key == "epoch_s":
            ax.set_yscale("log")
            _log_seconds_axis(ax.yaxis)
        ax.set_xlabel("measured halo payload per training epoch (forward + backward)")
        ax.set_ylabel(ylabel)
        ax.grid(True, which="major", alpha=0.3)
        ax.set_title(f"halo schemes, {doc.get('workers')} workers, {doc.get('epochs')} "
                     f"epochs", fontsize=10)
        fig.tight_layout()
        paths.append(_save(fig, out_dir, name))
    return paths


def drift_plot(weeks: list[dict], out_dir, name: str = "drift.png") -> str:
    """Payload per training epoch of the updated plan and of a fresh partition of each
    week's network (`update` reports, in week order), and the updated plan's excess."""
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    x = [w["week"] for w in weeks]
    fig, ax = plt.subplots(figsize=(5.2, 3.2))
    ax.plot(x, [w["after"]["epoch_payload_bytes"] for w in weeks], marker="o",
            label="updated plan")
    fresh = [(w["week"], w["fresh"]["epoch_payload_bytes"]) for w in weeks if w.get("fresh")]
    if fresh:
        ax.plot([f[0] for f in fresh], [f[1] for f in fresh], marker="s", linestyle="--",
                label="fresh partition")
    for w in weeks:
        if w.get("payload_excess_percent") is not None:
            ax.annotate(f"{w['payload_excess_percent']:+.1f} %",
                        (w["week"], w["after"]["epoch_payload_bytes"]),
                        textcoords="offset points", xytext=(0, 7), ha="center", fontsize=8)
    top = max(w["after"]["epoch_payload_bytes"] for w in weeks)
    _linear_bytes_axis(ax.yaxis, top * 1.15)
    ax.set_ylim(0, top * 1.15)
    ax.xaxis.set_major_locator(MultipleLocator(1))
    ax.set_xlabel("week")
    ax.set_ylabel("payload per training epoch")
    ax.set_title("drift of the plan as the network grows", fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    fig.tight_layout()
    return _save(fig, out_dir, name)
