"""Profile: phases are exclusive and add up with the waits; merge checks both sides agree."""
from __future__ import annotations

import json
import time

import msgpack
import pytest

from shardtrain.transport.meter import Profile, merge


def _spin(seconds):
    end = time.perf_counter() + seconds
    while time.perf_counter() < end:
        pass


def test_phases_are_exclusive_and_add_up_with_wait():
    p = Profile(0)
    t0 = time.perf_counter()
    with p.phase("compute"):
        _spin(0.02)
        t1 = time.perf_counter()
        with p.phase("exchange"):
            time.sleep(0.03)
            p.add_wait(0.03)          # the transport says it was blocked all along
            _spin(0.01)
        t2 = time.perf_counter()
        _spin(0.01)
    t3 = time.perf_counter()
    with p.phase("allreduce"):
        _spin(0.01)
    total = time.perf_counter() - t0
    d = p.to_dict()
    ph = d["phases"]
    parts = ph["compute"]["wall_s"] + ph["exchange"]["wall_s"] + ph["allreduce"]["wall_s"]
    assert parts + d["wait_s"] == pytest.approx(total, abs=2e-3)
    assert d["wait_s"] == pytest.approx(0.03)
    # Spans measured here (a loaded machine stretches the spins; the split must follow).
    assert ph["exchange"]["wall_s"] == pytest.approx(t2 - t1 - 0.03, abs=1e-3)  # wait moved out
    assert ph["compute"]["wall_s"] == pytest.approx(t3 - t0 - (t2 - t1), abs=1e-3)  # paused
    # CPU time: the sleep costs none (wall-clock bounds on CPU would depend on the load).
    assert 0 < ph["compute"]["cpu_s"] and ph["exchange"]["cpu_s"] < t2 - t1 - 0.025


def test_snapshot_is_json_and_msgpack_friendly():
    p = Profile(1)
    p.count(1, 0, "halo", 0, "forward", 800, 90)
    p.count(0, 1, "halo", 0, "forward", 400, 90)
    with p.phase("compute"):
        pass
    d = p.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert msgpack.unpackb(msgpack.packb(d)) == d
    assert d["bytes_sent"] == 890 and d["bytes_received"] == 490


def _two_sides(received_payload=800):
    a, b = Profile(0), Profile(1)
    for _ in range(2):
        a.count(0, 1, "halo", 1, "forward", 400, 90)
        b.count(0, 1, "halo", 1, "forward", received_payload // 2, 90)
    b.count(1, 0, "halo", 1, "backward", 100, 91)
    a.count(1, 0, "halo", 1, "backward", 100, 91)
    b.count(1, 0, "allreduce", -1, "reduce-scatter", 32, 80)
    a.count(1, 0, "allreduce", -1, "reduce-scatter", 32, 80)
    return [a.to_dict(), b.to_dict()]


def test_merge_totals_pairs_and_layers():
    m = merge(_two_sides())
    assert m["consistent"] and m["workers"] == 2
    assert m["payload_bytes"] == 800 + 100 + 32
    assert m["framing_bytes"] == 2 * 90 + 91 + 80 and m["frames"] == 4
    assert m["pair_payload_bytes"] == [[0, 800], [132, 0]]
    assert m["by_kind"]["allreduce"]["payload_bytes"] == 32
    ld = {(r["kind"], r["layer"], r["direction"]): r["payload_bytes"]
          for r in m["by_layer_direction"]}
    assert ld == {("halo", 1, "forward"): 800, ("halo", 1, "backward"): 100,
                  ("allreduce", -1, "reduce-scatter"): 32}


def test_merge_reports_a_receiver_that_counted_differently():
    m = merge(_two_sides(received_payload=600))
    assert not m["consistent"]
    assert m["mismatches"] == [{"src": 0, "dst": 1, "kind": "halo", "layer": 1,
                                "direction": "forward", "sent": [800, 180, 2],
                                "received": [600, 180, 2]}]
