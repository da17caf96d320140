"""The demo parcel network: sizes, roles, homophily, heavy-tailed degrees, determinism, and a
role signal that needs the routes to be read well."""
from __future__ import annotations

import os
import re

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from shardtrain.cli.flags import cli_message
from shardtrain.data.graph import normalized_adjacency
from shardtrain.data.readers import load_graph
from shardtrain.data.synth import (
    ROLE_NAMES,
    edge_array,
    parcel_network,
    role_name,
    same_role_fraction,
)
from shardtrain.errors import InputError


@pytest.fixture(scope="module")
def network():
    return parcel_network(20_000, 10, 6, 16, seed=7)


def test_sizes_and_roles(network):
    g = network
    assert g.num_vertices == 20_000
    assert abs(g.num_edges - 100_000) <= 1_000       # ~ vertices * avg_degree / 2 after dedup
    assert g.labels.min() >= 0 and g.labels.max() == 5
    assert g.features.shape == (20_000, 16) and g.features.dtype == np.float32
    assert g.train_mask.sum() == 6 * 20 and g.val_mask.sum() == 500 and g.test_mask.sum() == 1000
    assert role_name(0) == "hub" and role_name(len(ROLE_NAMES)) == "hub-2"


def test_homophily_near_requested(network):
    assert abs(same_role_fraction(network) - 0.8) < 0.02
    g = parcel_network(5_000, 8, 4, 4, seed=1, homophily=0.3)
    assert abs(same_role_fraction(g) - 0.3) < 0.03


def test_degrees_are_heavy_tailed(network):
    d = network.degrees
    assert d.max() > 15 * d.mean()
    # discrete power-law exponent by maximum likelihood above x_min = 20 (Clauset, Shalizi &
    # Newman 2009, eq. 3.7); the generator asks for 2.5
    x = d[d >= 20]
    alpha = 1 + x.size / np.log(x / 19.5).sum()
    assert 2.2 < alpha < 2.9


def test_ids_carry_no_role_order(network):
    # consecutive ids agree on role about as often as random pairs (sum of squared shares)
    same_next = np.mean(network.labels[1:] == network.labels[:-1])
    shares = np.bincount(network.labels) / network.num_vertices
    assert abs(same_next - np.sum(shares ** 2)) < 0.02


def test_deterministic_for_a_seed():
    a = parcel_network(3_000, 6, 5, 4, seed=11)
    b = parcel_network(3_000, 6, 5, 4, seed=11)
    c = parcel_network(3_000, 6, 5, 4, seed=12)
    for name in ("indptr", "indices", "features", "labels", "train_mask", "test_mask"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert not np.array_equal(a.indices, c.indices)


def test_roles_need_the_routes():
    # a scikit-learn logistic regression on a depot's own statistics vs. on two hops of
    # normalised-adjacency smoothing (the features a 2-layer GCN sees, Wu et al. 2019 SGC)
    g = parcel_network(4_000, 10, 6, 32, seed=3)
    x = g.features.astype(np.float64)
    a_hat = normalized_adjacency(g)
    smooth = a_hat @ (a_hat @ x)
    acc = {}
    for name, z in (("own", x), ("routes", smooth)):
        clf = LogisticRegression(max_iter=1000).fit(z[g.train_mask], g.labels[g.train_mask])
        acc[name] = np.mean(clf.predict(z[g.test_mask]) == g.labels[g.test_mask])
    assert 0.25 < acc["own"] < 0.7        # moderately informative on its own
    assert acc["routes"] > acc["own"] + 0.25


@pytest.mark.parametrize("kwargs,pattern", [
    (dict(vertices=1), r"--vertices 1: need at least 2"),
    (dict(avg_degree=0), r"--avg-degree 0: must be > 0"),
    (dict(classes=0), r"--classes 0"),
    (dict(features=0), r"--features 0"),
    (dict(degree_exponent=2.0), r"--degree-exponent 2.0: must be > 2"),
])
def test_bad_parameters(kwargs, pattern):
    args = dict(vertices=100, avg_degree=4, classes=3, features=2, seed=0) | kwargs
    with pytest.raises(InputError) as info:
        parcel_network(**args)
    assert re.search(pattern, cli_message(info.value))   # the CLI's wording (cli/flags.py)


def test_synth_command_writes_a_loadable_bundle(run_cli, tmp_path):
    out = tmp_path / "depots.npz"
    result = run_cli("synth", out, "--vertices", "3000", "--avg-degree", "6", "--classes", "5",
                     "--features", "8", "--seed", "4")
    assert result.returncode == 0, result.stderr
    assert result.stdout.startswith(f"wrote {out}: 3,000 depots")
    assert len(result.stdout.strip().splitlines()) == 1
    assert os.listdir(tmp_path) == ["depots.npz"]
    loaded = load_graph(out)
    same = parcel_network(3_000, 6, 5, 8, seed=4)
    assert np.array_equal(loaded.graph.indices, same.indices)
    assert np.array_equal(loaded.graph.features, same.features)
    assert np.array_equal(loaded.graph.val_mask, same.val_mask)
    assert loaded.cleanup.self_loops == 0 and loaded.cleanup.duplicates == 0
    assert edge_array(same).shape == (same.num_edges, 2)
