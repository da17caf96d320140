"""Dropout masks, Adam, the flat gradient vector, Glorot init."""
from __future__ import annotations

import math

import numpy as np
import pytest

from shardtrain.train import model


def test_mask_rows_do_not_depend_on_which_vertices_are_asked_for():
    """Counter-based generation: a shuffled subset gets exactly the full graph's rows."""
    n, width = 5000, 37                        # odd width: the last 16-bit half is dropped
    full = model.dropout_mask(11, 3, 1, np.arange(n), width, 0.5, np.float64)
    ids = np.random.default_rng(0).permutation(n)[:1234]
    part = model.dropout_mask(11, 3, 1, ids, width, 0.5, np.float64)
    assert np.array_equal(part, full[ids])
    assert set(np.unique(full)) == {0.0, 2.0}
    # a narrower request gives the leading columns of a wider one
    assert np.array_equal(model.dropout_mask(11, 3, 1, ids, 20, 0.5, np.float64),
                          part[:, :20])


@pytest.mark.parametrize("rate", [0.1, 0.5, 0.8])
def test_kept_fraction_and_inverted_scale(rate):
    mask = model.dropout_mask(0, 1, 0, np.arange(20000), 64, rate, np.float32)
    kept = mask > 0
    # 1.28M Bernoulli draws: standard error ~ 4e-4, so 3e-3 is > 7 sigma (common practice)
    assert abs(kept.mean() - (1 - rate)) < 3e-3
    # inverted dropout keeps the expectation: E[mask] = 1
    assert abs(mask.mean() - 1.0) < 1e-2
    # no visible structure: per-column and per-row kept fractions, neighbour correlation
    assert np.abs(kept.mean(axis=0) - (1 - rate)).max() < 0.02
    c = np.corrcoef(kept[:, :-1].ravel(), kept[:, 1:].ravel())[0, 1]
    assert abs(c) < 0.01


def test_masks_differ_between_seeds_epochs_layers_and_rate_zero_is_none():
    ids = np.arange(300)
    base = model.dropout_mask(1, 1, 0, ids, 16, 0.5, np.float32)
    for other in [(2, 1, 0), (1, 2, 0), (1, 1, 1)]:
        m = model.dropout_mask(*other, ids, 16, 0.5, np.float32)
        assert 0.4 < np.mean(m != base) < 0.6     # independent masks disagree half the time
    assert model.dropout_mask(1, 1, 0, ids, 16, 0.0, np.float32) is None
    drop = model.Dropout(1, 1, 0.0, ids)
    h = np.ones((300, 16))
    assert drop(0, h) is h


def test_adam_matches_a_hand_worked_two_steps():
    """Kingma & Ba 2015, Algorithm 1, worked by hand for one scalar parameter:
    theta0 = 1, lr = 0.1, g1 = 0.5, g2 = -1.
    step 1: m = 0.05, v = 0.00025, m^ = 0.5, v^ = 0.25  -> theta = 1 - 0.1 * 0.5 / (0.5 + 1e-8)
    step 2: m = -0.055, v = 0.00124975, m^ = -0.055 / 0.19, v^ = 0.00124975 / 0.001999
    """
    w = np.array([[1.0]])
    params = [(w, None)]
    adam = model.Adam(params, lr=0.1)
    adam.step(params, [(np.array([[0.5]]), None)])
    theta1 = 1 - 0.1 * 0.5 / (0.5 + 1e-8)
    assert w[0, 0] == pytest.approx(theta1, rel=1e-14)
    adam.step(params, [(np.array([[-1.0]]), None)])
    theta2 = theta1 - 0.1 * (-0.055 / 0.19) / (math.sqrt(0.00124975 / 0.001999) + 1e-8)
    assert w[0, 0] == pytest.approx(theta2, rel=1e-12)
    assert w[0, 0] == pytest.approx(0.936610, abs=1e-6)   # the same, by calculator
    st = adam.state()
    assert int(st["adam_t"]) == 2 and st["adam_m_w0"][0, 0] == pytest.approx(-0.055)


def test_adam_state_round_trip_continues_identically():
    rng = np.random.default_rng(0)
    def make():
        return [(np.ones((3, 2)), np.zeros(2)), (np.ones((2, 4)), np.zeros(4))]
    grads = [[(rng.normal(size=(3, 2)), rng.normal(size=2)),
              (rng.normal(size=(2, 4)), rng.normal(size=4))] for _ in range(3)]
    p1, p2 = make(), make()
    a1, a2 = model.Adam(p1, 0.01), model.Adam(p2, 0.01)
    for g in grads[:2]:
        a1.step(p1, g)
        a2.step(p2, g)
    a3 = model.Adam(p2, 0.01)
    a3.load_state(a2.state())
    a1.step(p1, grads[2])
    a3.step(p2, grads[2])
    for x, y in zip(model._leaves(p1), model._leaves(p2)):
        assert x.tobytes() == y.tobytes()


def test_flatten_unflatten_and_names():
    params = model.glorot_init([(4, 3), (3, 2)], 0, np.float32, bias=True)
    assert model.param_names(params) == ["w0", "b0", "w1", "b1"]
    flat = model.flatten(params)
    assert flat.shape == (12 + 3 + 6 + 2,) and flat.flags.c_contiguous
    back = model.unflatten(flat, params)
    for (w, b), (w2, b2) in zip(params, back):
        assert np.array_equal(w, w2) and np.array_equal(b, b2)
    assert model.param_names(model.glorot_init([(4, 3)], 0, np.float32)) == ["w0"]


def test_glorot_limit_and_determinism():
    """Glorot & Bengio 2010: U(-sqrt(6/(in+out)), +sqrt(6/(in+out)))."""
    (w, b), = model.glorot_init([(300, 200)], 5, np.float64)
    limit = math.sqrt(6 / 500)
    assert b is None and np.abs(w).max() <= limit
    # variance of U(-a, a) is a^2 / 3 = 2 / (in + out)
    assert w.var() == pytest.approx(2 / 500, rel=0.02)
    (w2, _), = model.glorot_init([(300, 200)], 5, np.float64)
    assert w.tobytes() == w2.tobytes()


def test_mask_bits_are_pinned():
    """Regression pin (common practice): saved runs replay only if the mask bits never
    change; a change of the hash must be deliberate and fail here first."""
    m = model.dropout_mask(0, 1, 0, np.array([0, 1, 123456789]), 16, 0.5, np.float32)
    bits = ["".join("1" if v else "0" for v in row) for row in m]
    assert bits == ["0101100110111100", "0100101001011000", "0010110010011010"]
