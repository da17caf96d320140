"""Measured payload equals the survey's prediction, byte for byte, also when every halo
frame is larger than a pipe's kernel buffer (so a transport that wrote before reading
would deadlock). Source of truth: `shardtrain.plan.survey.predict_traffic`, computed from the
shards and the exchange schedule alone, without running anything."""
from __future__ import annotations

import numpy as np
from helpers import depot_graph, run_partitioned

from shardtrain.train.settings import TrainSettings
from shardtrain.transport.pipes import PIPE_BYTES


def test_measured_payload_equals_predicted_with_frames_beyond_the_pipe_buffer(tmp_path):
    # 4000 depots split in two at random: about half of each side is the other's halo
    graph = depot_graph(n=4000, classes=3, features=96, seed=5)
    settings = TrainSettings(layers=2, hidden=128, dropout=0.5, epochs=1, dtype="float64")
    run, shards = run_partitioned(tmp_path, graph, np.random.default_rng(0).integers(0, 2, 4000),
                                  2, settings)
    t = run.traffic
    # layer 0 is aggregate-first (96 -> 128), so 96 columns per halo row cross the wire
    biggest = max(len(s.send_to(q)) for s in shards for q in s.peers()) * 96 * 8
    assert biggest > PIPE_BYTES
    assert t["measured_payload_bytes"] == t["predicted_payload_bytes"]
    assert t["breakdown_matches"] and t["sender_receiver_consistent"]
    by_direction = {(r["layer"], r["direction"]): r["payload_bytes"]
                    for r in t["by_layer_direction"] if r["kind"] == "halo"}
    rows = sum(len(s.send_to(q)) for s in shards for q in s.peers())
    assert by_direction[(0, "forward")] == rows * 96 * 8       # features, one epoch
    assert by_direction[(0, "eval")] == rows * 96 * 8
    assert (0, "backward") not in by_direction                 # features need no gradient
    assert by_direction[(1, "backward")] == rows * 3 * 8       # transform-first 128 -> 3
