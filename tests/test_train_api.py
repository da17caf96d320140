"""The library API of training (`shardtrain.train.api`) and the run accounting it returns.

- `api.run` writes the very JSON the `train` command writes (the command only parses and
  prints), timing fields aside;
- its checks come before anything is created (no checkpoint folder for a refused config);
- the traffic prediction the accounting computes from the workers' send/halo pointers
  equals the survey's prediction from the shards, and its row counts equal an independent
  count with scipy's public sparse product (common practice: the halo of p is the set of
  vertices outside p adjacent to p's vertices, so p sends q the vertices of p with a
  neighbour in q).
"""
from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.sparse as sp
from helpers import depot_graph, save_graph

from shardtrain.errors import ParameterError
from shardtrain.train import api
from shardtrain.train.settings import TrainSettings


def _untimed(doc):
    """The document without timing fields (the rule of scripts/outputs_diff.py)."""
    if isinstance(doc, dict):
        return {k: _untimed(v) for k, v in doc.items()
                if not (k.endswith("_s") or "_s_per_" in k or k == "seconds"
                        or k.endswith("rss_bytes"))}
    if isinstance(doc, list):
        return [_untimed(v) for v in doc]
    return doc


def test_api_run_writes_what_the_command_writes(tmp_path, run_cli):
    graph_file = tmp_path / "depots.npz"
    save_graph(graph_file, depot_graph(n=200))
    out = tmp_path / "cli.json"
    proc = run_cli("train", graph_file, "--workers", "2", "--method", "range", "--epochs",
                   "3", "--dtype", "float64", "--seed", "4", "--quiet", "--json", out)
    assert proc.returncode == 0, proc.stderr
    seen = []
    outcome = api.run(api.RunConfig(source=str(graph_file), workers=2, method="range",
                                    settings=TrainSettings(epochs=3, dtype="float64",
                                                           seed=4)),
                      on_epoch=lambda rec: seen.append(rec["epoch"]), signals=False)
    assert outcome is not None and seen == [1, 2, 3]
    doc = json.loads(json.dumps(outcome.document))     # the JSON types the file holds
    assert _untimed(doc) == _untimed(json.loads(out.read_text()))
    assert outcome.result.traffic["breakdown_matches"]


@pytest.mark.parametrize("change, param", [
    ({"timeout_s": -1.0}, "timeout_s"),
    ({"imbalance": 1.5}, "imbalance"),
    ({"slow_workers": {5: 2.0}}, "slow_workers"),
    ({"mode": "reference", "method": None, "workers": None, "max_frame_bytes": 1024},
     "max_frame_bytes"),
    ({"mode": "reference", "method": None}, "workers"),
])
def test_a_refused_config_creates_nothing(tmp_path, change, param):
    graph_file = tmp_path / "depots.npz"
    save_graph(graph_file, depot_graph(n=150))
    folder = tmp_path / "ckpt"
    fields = {"workers": 2, "method": "range", "checkpoint": str(folder), **change}
    config = api.RunConfig(source=str(graph_file), **fields)
    with pytest.raises(ParameterError) as info:       # naming the RunConfig field
        api.run(config, signals=False)
    assert info.value.param == param and str(info.value).startswith(param)
    assert not folder.exists()


def test_accounting_predicts_from_pointers_what_the_survey_predicts_from_shards():
    from shardtrain.plan import survey
    from shardtrain.plan.schedule import layer_dims, layer_hops
    from shardtrain.plan.shards import build_shards

    g = depot_graph(n=150)
    k = 3
    owner = np.random.default_rng(0).integers(0, k, g.num_vertices)
    shards = build_shards(g, owner, k)
    send_rows, halo_rows = survey.peer_rows([s.send_ptr for s in shards],
                                            [s.halo_ptr for s in shards])
    # independent count: vertex u of p has a neighbour in q (scipy's public product)
    adj = sp.csr_matrix((np.ones(g.indices.shape[0]), g.indices, g.indptr),
                        shape=(g.num_vertices,) * 2)
    onehot = sp.csr_matrix((np.ones(g.num_vertices), (np.arange(g.num_vertices), owner)),
                           shape=(g.num_vertices, k))
    touches = (adj @ onehot).toarray() > 0                 # (n, k): u has a neighbour in q
    expected = np.stack([touches[owner == p].sum(axis=0) for p in range(k)])
    np.fill_diagonal(expected, 0)
    assert np.array_equal(send_rows, expected)
    assert np.array_equal(halo_rows, expected.T)           # what q receives from p
    hops = layer_hops(layer_dims(g.input_dim, 8, g.num_classes, 2))
    elements = survey.parameter_elements(hops)
    assert survey.predict_traffic_of_rows(send_rows, halo_rows, hops, 8,
                                          param_elements=elements) == \
        survey.predict_traffic(shards, hops, 8, param_elements=elements)
    assert survey.predict_payload_breakdown_of_rows(
        send_rows, halo_rows, hops, 8, param_elements=elements, epochs=3, evals=3,
        stop_votes=3) == survey.predict_payload_breakdown(
        shards, hops, 8, param_elements=elements, epochs=3, evals=3, stop_votes=3)
