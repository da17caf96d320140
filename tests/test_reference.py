"""The single-process reference trainer: its loss is the GCN objective, it is deterministic,
and its settings reject bad values by option name."""
from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from shardtrain.data.graph import Graph, csr_from_edges
from shardtrain.errors import InputError
from shardtrain.train import model
from shardtrain.train.reference import train_reference
from shardtrain.train.settings import TrainSettings


def _small_graph(n=60, classes=3, dim=7, seed=0):
    """A connected random graph (networkx, Erdős–Rényi) with random features and labels."""
    g = nx.gnp_random_graph(n, 0.1, seed=seed)
    g.add_edges_from((i, i + 1) for i in range(n - 1))
    edges = np.array(list(g.edges()), dtype=np.int64)
    indptr, indices, _ = csr_from_edges(edges[:, 0], edges[:, 1], n)
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, classes, size=n)
    split = rng.permutation(n)
    train, val, test = (np.isin(np.arange(n), split[a:b]) for a, b in
                        ((0, 20), (20, 35), (35, n)))
    return g, Graph(indptr, indices, rng.normal(size=(n, dim)), labels, train, val, test)


def test_first_loss_is_the_gcn_objective_computed_with_networkx():
    """Epoch 1's loss equals mean cross-entropy + wd/2 ||W0||^2 at the Glorot weights, with
    Â = I - normalized Laplacian of (A + I) from networkx (Kipf & Welling 2017, eq. 2)."""
    g, graph = _small_graph()
    settings = TrainSettings(dropout=0.0, dtype="float64", epochs=1, weight_decay=0.01,
                             bias=True, seed=4)
    result = train_reference(graph, settings)
    gl = g.copy()
    gl.add_edges_from((v, v) for v in gl.nodes)
    a_hat = np.eye(graph.num_vertices) - nx.normalized_laplacian_matrix(
        gl, nodelist=range(graph.num_vertices)).toarray()
    dims = [(7, 16), (16, 3)]
    (w0, b0), (w1, b1) = model.glorot_init(dims, 4, np.float64, bias=True)
    z = a_hat @ np.maximum(a_hat @ graph.features @ w0 + b0, 0) @ w1 + b1
    logp = z - np.log(np.exp(z).sum(axis=1, keepdims=True))
    t = graph.train_mask
    expected = -logp[t, graph.labels[t]].mean() + 0.01 * 0.5 * (w0 ** 2).sum()
    assert result.epochs[0]["loss"] == pytest.approx(expected, rel=1e-12)


def test_reference_is_deterministic_to_the_bit():
    _, graph = _small_graph()
    settings = TrainSettings(epochs=15, seed=3, bias=True)      # float32, dropout 0.5
    a = train_reference(graph, settings)
    b = train_reference(graph, settings)
    assert [r["loss"] for r in a.epochs] == [r["loss"] for r in b.epochs]
    for (wa, ba), (wb, bb) in zip(a.params, b.params):
        assert wa.tobytes() == wb.tobytes() and ba.tobytes() == bb.tobytes()
    assert np.array_equal(a.predictions, b.predictions)
    # and the seed matters
    c = train_reference(graph, TrainSettings(epochs=15, seed=4, bias=True))
    assert c.params[0][0].tobytes() != a.params[0][0].tobytes()


def test_training_lowers_the_loss_and_records_every_epoch():
    _, graph = _small_graph()
    seen = []
    result = train_reference(graph, TrainSettings(epochs=30, dropout=0.0, dtype="float64"),
                             on_epoch=seen.append)
    assert seen == result.epochs and [r["epoch"] for r in seen] == list(range(1, 31))
    assert set(seen[0]) == {"epoch", "loss", "train_loss", "val_loss", "train_acc", "val_acc",
                            "test_acc", "epoch_s"}
    assert result.epochs[-1]["loss"] < result.epochs[0]["loss"]
    assert result.predictions.dtype == np.int64
    assert result.predictions.shape == (graph.num_vertices,)
    assert result.params[0][0].dtype == np.float64


def test_init_params_are_used_and_checked():
    _, graph = _small_graph()
    settings = TrainSettings(epochs=1, dropout=0.0, dtype="float64", lr=1e-9)
    init = model.glorot_init([(7, 16), (16, 3)], 99, np.float64)
    result = train_reference(graph, settings, init_params=init)
    np.testing.assert_allclose(result.params[0][0], init[0][0], atol=1e-8)
    with pytest.raises(InputError, match="w1"):
        train_reference(graph, settings,
                        init_params=model.glorot_init([(7, 16), (16, 4)], 0, np.float64))


@pytest.mark.parametrize("field,value,option", [
    ("layers", 0, "--layers"), ("hidden", 0, "--hidden"), ("dropout", 1.0, "--dropout"),
    ("dropout", -0.1, "--dropout"), ("lr", 0.0, "--lr"), ("weight_decay", -1e-3,
                                                            "--weight-decay"),
    ("epochs", 0, "--epochs"), ("dtype", "float16", "--dtype")])
def test_settings_name_the_bad_option(field, value, option):
    from shardtrain.cli.flags import cli_message

    with pytest.raises(InputError, match=f"^{field}:") as info:    # the library's parameter
        TrainSettings(**{field: value}).validate()
    assert cli_message(info.value).startswith(f"{option}:")      # the option, on the CLI


def test_settings_defaults_are_the_gcn_paper_setup_and_round_trip():
    s = TrainSettings()
    # Kipf & Welling 2017, section 5.1
    assert (s.layers, s.hidden, s.dropout, s.lr, s.weight_decay, s.epochs) == \
        (2, 16, 0.5, 0.01, 5e-4, 200)
    assert TrainSettings.from_dict(s.to_dict()) == s
    with pytest.raises(InputError, match="momentum"):
        TrainSettings.from_dict({"momentum": 0.9})


def test_missing_labels_is_an_input_error():
    _, graph = _small_graph()
    bare = Graph(graph.indptr, graph.indices, graph.features)
    with pytest.raises(InputError, match="labels"):
        train_reference(bare, TrainSettings(epochs=1))


def test_model_api_partitioned_in_threads_equals_the_reference():
    """The model contract is enough for partitioned training: K threads, each owning a
    shuffled block of rows, with propagate = Â[P, :] @ (rows gathered from all),
    propagate_t = Â[:, P]ᵀ @ (rows gathered from all), a summing all-reduce and dropout
    keyed by global ids, reproduce the reference's losses and weights in float64."""
    import threading

    from shardtrain.data.graph import normalized_adjacency
    from shardtrain.plan.schedule import layer_dims, layer_hops

    _, graph = _small_graph(n=50, dim=9)
    settings = TrainSettings(layers=3, hidden=6, epochs=6, dtype="float64", bias=True,
                             seed=2, weight_decay=0.01)
    ref = train_reference(graph, settings)

    k, n = 3, graph.num_vertices
    owned = np.array_split(np.random.default_rng(1).permutation(n), k)
    a_hat = normalized_adjacency(graph)
    dims = layer_dims(9, 6, graph.num_classes, 3)
    hops = layer_hops(dims)
    assert {h.transform_first for h in hops} == {True, False}
    barrier = threading.Barrier(k)
    board = {}
    n_train = int(graph.train_mask.sum())
    losses = np.zeros((k, settings.epochs))
    finals = [None] * k

    def gather(p, rows):
        board[p] = rows
        barrier.wait()
        full = np.zeros((n, rows.shape[1]))
        for q in range(k):
            full[owned[q]] = board[q]
        barrier.wait()
        return full

    def worker(p):
        ids = owned[p]
        params = model.glorot_init(dims, settings.seed, np.float64, True)
        adam = model.Adam(params, settings.lr)
        def prop(l, m):
            return a_hat[ids] @ gather(p, m)
        def prop_t(l, g):
            return a_hat[:, ids].T @ gather(p, g)

        def allreduce(flat):
            board[("g", p)] = flat.copy()
            barrier.wait()
            flat[...] = sum(board[("g", q)] for q in range(k))
            barrier.wait()

        for e in range(1, settings.epochs + 1):
            pen = model.weight_decay_penalty(params, settings.weight_decay)
            part = model.train_step(params, adam, graph.features[ids], graph.labels[ids],
                                    graph.train_mask[ids], n_train, hops, prop, prop_t,
                                    model.Dropout(settings.seed, e, settings.dropout, ids),
                                    allreduce, settings.weight_decay)
            losses[p, e - 1] = part + pen / k
        finals[p] = params

    threads = [threading.Thread(target=worker, args=(p,)) for p in range(k)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    np.testing.assert_allclose(losses.sum(axis=0), [r["loss"] for r in ref.epochs], rtol=1e-12)
    for params in finals:
        for (w, b), (rw, rb) in zip(params, ref.params):
            np.testing.assert_allclose(w, rw, rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(b, rb, rtol=1e-9, atol=1e-12)


def test_locality_order_changes_only_the_order_of_sums():
    """Reverse Cuthill-McKee numbering inside the reference is invisible in float64."""
    _, graph = _small_graph(n=80)
    settings = TrainSettings(epochs=8, dtype="float64", bias=True, seed=5)
    a = train_reference(graph, settings, reorder=True)
    b = train_reference(graph, settings, reorder=False)
    np.testing.assert_allclose([r["loss"] for r in a.epochs], [r["loss"] for r in b.epochs],
                               rtol=1e-12)
    for (wa, ba), (wb, bb) in zip(a.params, b.params):
        np.testing.assert_allclose(wa, wb, rtol=1e-10, atol=1e-13)
        np.testing.assert_allclose(ba, bb, rtol=1e-10, atol=1e-13)
    assert np.array_equal(a.predictions, b.predictions)
    assert [r["val_acc"] for r in a.epochs] == [r["val_acc"] for r in b.epochs]
