"""Ring all-reduce: the sum, identical bits everywhere, and the traffic of Patarasuk & Yuan
(2009): each of k ranks sends 2(k-1)/k of the vector, up to chunk rounding."""
from __future__ import annotations

import queue
import threading

import numpy as np
import pytest

from shardtrain.transport.ring import (
    ring_allreduce,
    ring_chunks,
    ring_frames,
    ring_send_elements,
    ring_steps,
)

KS = (1, 2, 3, 5, 8)
SIZES = (0, 1, 2, 4, 7, 1000, 10_007)     # odd sizes, and sizes below k


def simulate(inputs: list[np.ndarray], steps=None) -> tuple[list[np.ndarray], np.ndarray]:
    """Run ring_allreduce on k threads joined by queues; return results and elements sent.
    `steps`, when given, collects (direction, step, sent, received) per rank."""
    k = len(inputs)
    bufs = [x.copy() for x in inputs]
    links = {(r, (r + 1) % k): queue.Queue() for r in range(k)}
    sent = np.zeros(k, dtype=np.int64)
    errors = []

    def run(rank):
        def sendrecv(dst, send_view, src, recv_view, direction, step):
            sent[rank] += send_view.size
            if steps is not None:
                steps.setdefault(rank, []).append((direction, step, send_view.size,
                                                   recv_view.size))
            links[rank, dst].put((direction, step, send_view.copy()))
            got_dir, got_step, data = links[src, rank].get(timeout=10)
            assert (got_dir, got_step) == (direction, step)
            recv_view[...] = data
        try:
            ring_allreduce(bufs[rank], rank, k, sendrecv)
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(r,)) for r in range(k)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    if errors:
        raise errors[0]
    return bufs, sent


def test_chunks_are_those_of_numpy_array_split():
    # Reference: numpy.array_split's documented sizes (first size % k chunks one longer).
    for size in SIZES:
        for k in KS:
            want = [len(c) for c in np.array_split(np.arange(size), k)]
            assert np.diff(ring_chunks(size, k)).tolist() == want


@pytest.mark.parametrize("k", KS)
@pytest.mark.parametrize("size", SIZES)
def test_sum_matches_numpy_in_float64(k, size):
    rng = np.random.default_rng(1000 * k + size)
    inputs = [rng.standard_normal(size) for _ in range(k)]
    results, _ = simulate(inputs)
    exact = np.sum(inputs, axis=0)        # reference: numpy's sum, to rounding
    for r in results:
        np.testing.assert_allclose(r, exact, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("k", KS)
def test_float32_results_have_identical_bits_on_every_rank(k):
    rng = np.random.default_rng(k)
    # Values of very different magnitude make the sum depend on the order of addition.
    inputs = [(rng.standard_normal(1001) * 10.0 ** rng.integers(-6, 6, 1001)).astype(np.float32)
              for _ in range(k)]
    results, _ = simulate(inputs)
    for r in results:
        assert r.tobytes() == results[0].tobytes()
    np.testing.assert_allclose(results[0], np.sum(np.array(inputs, np.float64), axis=0),
                               rtol=1e-5, atol=1e-5 * np.abs(inputs).max())


@pytest.mark.parametrize("k", KS)
@pytest.mark.parametrize("size", SIZES)
def test_traffic_is_two_k_minus_one_over_k_and_predicted_exactly(k, size):
    inputs = [np.ones(size) for _ in range(k)]
    _, sent = simulate(inputs)
    np.testing.assert_array_equal(sent, ring_send_elements(size, k))
    # Patarasuk & Yuan 2009: 2(k-1)/k of the vector per rank; the two chunks a rank does not
    # send differ from size/k by less than one element each.
    assert np.all(np.abs(sent - 2 * (k - 1) / k * size) < 2)


@pytest.mark.parametrize("k", KS)
@pytest.mark.parametrize("size", (3, 1000, 10_007))
def test_ring_steps_describe_what_the_algorithm_does(k, size):
    steps = {}
    simulate([np.ones(size) for _ in range(k)], steps)
    for r in range(k):
        assert steps.get(r, []) == ring_steps(size, k, r)
        assert len(ring_steps(size, k, r)) == ring_frames(k)


def test_rejects_non_contiguous_buffers():
    with pytest.raises(ValueError, match="contiguous 1-D"):
        ring_allreduce(np.zeros(10)[::2], 0, 2, lambda *a: None)
