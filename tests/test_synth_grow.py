"""`synth --grow WEEKS --growth RATE`: weekly deltas of the parcel network.

Checks against the definitions the generator states: preferential attachment (Barabási &
Albert 1999) draws an existing depot with probability (routes + 1) / sum, so the mean routes
of the depots new depots attach to is the size-biased mean sum d (d + 1) / sum (d + 1) (a
known property of degree-proportional sampling), far above the plain mean; routes stay
within a role with probability `homophily`, as in `parcel_network`.
"""
from __future__ import annotations

import numpy as np

from shardtrain.data.synth import grow_parcel_network, parcel_network


def test_new_depots_attach_preferentially_and_by_role():
    g = parcel_network(4000, 10.0, 6, 8, seed=3)
    (delta,) = grow_parcel_network(g, 1, 0.2, seed=3, homophily=0.8)
    n = g.num_vertices
    e = delta["edges"]
    assert e.shape[1] == 2 and (e[:, 0] < e[:, 1]).all()
    new_routes = e[e[:, 1] >= n]
    old_end = new_routes[:, 0]
    assert (old_end < n).all()                     # new depots attach to existing ones
    d = g.degrees.astype(np.float64)
    size_biased = float((d * (d + 1)).sum() / (d + 1).sum())
    got = float(d[old_end].mean())
    assert abs(got - size_biased) < 0.1 * size_biased, (got, size_biased, d.mean())
    assert got > 1.5 * d.mean()
    labels = np.concatenate([g.labels, delta["vertices"]["labels"]])
    same = float(np.mean(labels[new_routes[:, 0]] == labels[new_routes[:, 1]]))
    assert abs(same - 0.8) < 0.04, same
    # every row is a change: no loops, repeats, or routes already present
    keys = e[:, 0] * (n + 1000) + e[:, 1]
    assert np.unique(keys).shape[0] == keys.shape[0]
    rows = np.repeat(np.arange(n), g.degrees)
    old_keys = set((rows * (n + 1000) + g.indices).tolist())
    assert not old_keys & set(keys.tolist())
    v = delta["vertices"]
    assert v["features"].shape == (800, 8) and v["features"].dtype == g.features.dtype
    assert not v["train_mask"].any() and v["test_mask"].all()


def test_growth_is_deterministic_and_compounds():
    g = parcel_network(1000, 8.0, 4, 4, seed=1)
    a = grow_parcel_network(g, 3, 0.05, seed=9)
    b = grow_parcel_network(g, 3, 0.05, seed=9)
    for x, y in zip(a, b):
        assert np.array_equal(x["edges"], y["edges"])
    sizes = [d["vertices"]["labels"].shape[0] for d in a]
    assert sizes == [50, 52, 55]                   # 5 % of 1000, 1050, 1102 (rounded)
    assert a[1]["edges"].max() < 1000 + 50 + 52    # week 2 names only ids that exist by then


def test_grow_cli_writes_deltas_that_update_takes(tmp_path, run_cli):
    out = tmp_path / "net.npz"
    r = run_cli("synth", out, "--vertices", "600", "--features", "6", "--grow", "2")
    assert r.returncode == 0, r.stderr
    r = run_cli("split", out, "--workers", "2", "--method", "fennel", "--out", tmp_path / "w0")
    assert r.returncode == 0, r.stderr
    for week in (1, 2):
        r = run_cli("update", tmp_path / f"w{week - 1}",
                    "--add-vertices", tmp_path / f"net.week{week:02d}.vertices.npz",
                    "--add-edges", tmp_path / f"net.week{week:02d}.edges.npz",
                    "--out", tmp_path / f"w{week}", "--no-fresh")
        assert r.returncode == 0, r.stderr
        assert "note" not in r.stderr                 # every row a valid change
    r = run_cli("synth", out, "--growth", "0.1")
    assert r.returncode == 2 and "--grow" in r.stderr
    r = run_cli("synth", tmp_path / "x.npz", "--grow", "2", "--growth", "3")
    assert r.returncode == 2 and "--growth" in r.stderr and "Traceback" not in r.stderr
