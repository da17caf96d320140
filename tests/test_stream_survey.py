"""Streaming plans and the streaming survey of a graph directory (issue 11, parts 2-3).

Oracles: the in-memory survey (`plan.survey`, which builds every shard and is itself
checked against a trained run's measured bytes in tests/test_survey.py) for every field of
the JSON; scipy.sparse indicator-matrix products for the halo counts (common practice: with
B the n x k owner indicator, (A B)[v, q] > 0 iff v has a neighbour owned by q); the
in-memory partition methods for the streaming ones.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from shardtrain.data.graphdir import open_graph_dir, write_graph_dir
from shardtrain.data.readers import load_graph
from shardtrain.data.synth import parcel_network
from shardtrain.errors import InputError
from shardtrain.plan.partition import load_assignment, partition_plan
from shardtrain.plan.shards import check_shard_dir, load_shard
from shardtrain.plan.stream_survey import count_plan, stream_survey
from shardtrain.plan.streaming import (
    load_assignment_mapped,
    metis_memory_bytes,
    stream_partition,
    vertex_chunks,
)
from shardtrain.plan.survey import SurveySettings, survey
from shardtrain.units import parse_size

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "scripts"))
from helpers import save_graph  # noqa: E402
from outputs_diff import differences  # noqa: E402  (the snapshot scripts' timing rule)


def _same(a: dict, b: dict) -> list[str]:
    """Differences of two survey documents, timing fields aside (outputs_diff's rule), the
    source path and the streaming survey's own "streaming" record aside."""
    a, b = json.loads(json.dumps(a)), json.loads(json.dumps(b))
    out: list[str] = []
    for doc in (a, b):
        doc.pop("streaming", None)
        doc["graph"].pop("source", None)
    for i, (p, q) in enumerate(zip(a["plans"], b["plans"])):
        for key in ("pair_bytes", "send_rows"):    # k x k: compared whole, as arrays
            x, y = np.array(p["traffic"].pop(key)), np.array(q["traffic"].pop(key))
            if x.dtype != y.dtype or not np.array_equal(x, y):
                out.append(f".plans[{i}].traffic.{key} differs")
    differences(a, b, "", out)
    return out


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    """(graph file, graph dir) of the same parcel network, the dir written from what the
    CLI loads of the file."""
    tmp = tmp_path_factory.mktemp("stream")
    g = parcel_network(3000, 8, 4, 6, 1)
    file = tmp / "parcels.npz"
    save_graph(file, g)
    loaded = load_graph(file)
    write_graph_dir(loaded.graph, tmp / "parcels.graph")
    return file, tmp / "parcels.graph", loaded.graph


# ---------------------------------------------------------------- sizes

def test_parse_size_binary_suffixes():
    # binary units (IEC 80000-13): K = 2**10, M = 2**20, G = 2**30
    assert parse_size("512M") == 512 * 2**20
    assert parse_size("4G") == 4 * 2**30
    assert parse_size("1.5k") == 1536
    assert parse_size("2KiB") == 2048 and parse_size("3gb") == 3 * 2**30
    assert parse_size("1000") == 1000
    for bad in ("", "abc", "-1M", "1Q", "0", "0.1"):
        with pytest.raises(InputError, match="--memory-budget"):
            parse_size(bad)


# ---------------------------------------------------------------- plans

@pytest.mark.parametrize("method", ["random", "range", "fennel", "metis"])
@pytest.mark.parametrize("k", [1, 2, 5, 16])
def test_streaming_plans_equal_the_in_memory_plans(pair, method, k):
    _, folder, g = pair
    gd = open_graph_dir(folder)
    assert gd.indices.dtype == np.int32 and isinstance(gd.indices, np.memmap)
    streamed, details = stream_partition(gd, method, k, seed=7, memory_budget=2**30)
    expect, expect_details = partition_plan(g, method, k, seed=7)
    assert streamed.dtype == np.int16        # the O(n) array a plan holds: 2 bytes a vertex
    np.testing.assert_array_equal(streamed, expect)
    assert details == expect_details


def test_metis_over_the_budget_is_refused_naming_the_streaming_methods(pair):
    _, folder, _ = pair
    gd = open_graph_dir(folder)
    need = metis_memory_bytes(gd.num_vertices, gd.num_edges)
    with pytest.raises(InputError, match=r"method metis: METIS would need about .* "
                                         r"\(random, range, fennel, ldg\)") as caught:
        stream_partition(gd, "metis", 4, memory_budget=need - 1)
    # the library names the parameter; the command line words it as the options
    from shardtrain.cli.flags import cli_message
    assert cli_message(caught.value).startswith("--method metis: METIS would need")
    assert "over --memory-budget" in cli_message(caught.value)
    stream_partition(gd, "metis", 4, memory_budget=need)          # fits: runs


def test_vertex_chunks_cover_every_vertex_within_the_entry_limit():
    indptr = np.concatenate([[0], np.cumsum([3, 0, 10, 1, 1, 0, 2, 5])]).astype(np.int64)
    for limit in (1, 2, 4, 11, 100):
        chunks = vertex_chunks(indptr, limit)
        assert chunks[0][0] == 0 and chunks[-1][1] == 8
        assert all(a[1] == b[0] for a, b in zip(chunks, chunks[1:]))
        for lo, hi in chunks:
            # at most `limit` entries, unless a single row alone holds more
            assert indptr[hi] - indptr[lo] <= limit or hi == lo + 1


# ---------------------------------------------------------------- counts

@pytest.mark.parametrize("k", [2, 7, 64])
def test_halo_counts_match_indicator_products(pair, k):
    _, folder, g = pair
    gd = open_graph_dir(folder)
    owner = stream_partition(gd, "random", k, seed=k)[0]
    n = g.num_vertices
    a = sp.csr_matrix((np.ones(g.indices.shape[0]), g.indices, g.indptr), shape=(n, n))
    b = sp.csr_matrix((np.ones(n), owner.astype(np.int64), np.arange(n + 1)), shape=(n, k))
    per_owner = (a @ b).toarray()                      # [v, q]: neighbours of v q owns
    need = per_owner > 0                               # v has a neighbour owned by q
    need[np.arange(n), owner] = False                  # ... other than its own owner
    cross = g.degrees - per_owner[np.arange(n), owner]  # entries of row v to other owners
    send_rows = (b.T @ need.astype(np.int64)).astype(np.int64)   # [p, q]: v owned by p
    for entries in (1, 50, 10**9):                     # one row per chunk .. one chunk
        c = count_plan(gd.indptr, gd.indices, owner, k, vertex_chunks(gd.indptr, entries))
        np.testing.assert_array_equal(c["send_rows"], send_rows)
        np.testing.assert_array_equal(c["owned"], np.bincount(owner, minlength=k))
        np.testing.assert_array_equal(c["local_edges"],
                                      np.bincount(owner, weights=g.degrees, minlength=k))
        np.testing.assert_array_equal(c["cut_entries"],
                                      np.bincount(owner, weights=cross, minlength=k))


def test_library_survey_is_the_same_in_any_chunking(pair):
    _, folder, g = pair
    gd = open_graph_dir(folder)
    settings = SurveySettings(layers=3, hidden=8, bias=True)
    want = survey(g, ["fennel", "range"], [3, 16], settings)
    for entries in (97, None):
        got = stream_survey(gd, ["fennel", "range"], [3, 16], settings,
                            memory_budget=2**30, entries_per_chunk=entries)
        assert _same(want, got) == []
    rec = got["streaming"]
    assert rec["memory_budget_bytes"] == 2**30 and rec["peak_rss_bytes"] > 0
    assert set(got["plans"][0]["pass_s"]) >= {"partition", "count", "fennel_pass_1"}


# ---------------------------------------------------------------- the command

def _survey_cli(run_cli, tmp_path, graph, name, *extra):
    out = tmp_path / f"{name}.json"
    r = run_cli("survey", graph, "--json", out, *extra)
    assert r.returncode == 0, r.stderr
    return json.loads(out.read_text())


def test_survey_of_a_graph_dir_writes_the_survey_of_the_file(pair, run_cli, tmp_path):
    file, folder, _ = pair
    common = ("--workers", "2,4,16", "--hidden", "12", "--dtype", "float64")
    want = _survey_cli(run_cli, tmp_path, file, "file", "--method",
                       "random,range,fennel,ldg,metis", *common)
    # a tiny budget: the counting pass reads many small chunks
    streamed = _survey_cli(run_cli, tmp_path, folder, "dir", "--method",
                           "random,range,fennel,ldg", "--memory-budget", "64K", *common)
    metis = _survey_cli(run_cli, tmp_path, folder, "metis", "--method", "metis", *common)
    assert all(c["chunks"] > 1 for c in streamed["streaming"]["chunks"])
    assert streamed["streaming"]["memory_budget_bytes"] == 64 * 1024
    got = dict(streamed, plans=streamed["plans"] + metis["plans"])
    assert _same(want, got) == []


@pytest.mark.slow
def test_survey_of_a_graph_dir_at_1024_workers(run_cli, tmp_path):
    g = parcel_network(4000, 6, 3, 2, 5)
    save_graph(tmp_path / "g.npz", g)
    write_graph_dir(load_graph(tmp_path / "g.npz").graph, tmp_path / "g.graph")
    common = ("--workers", "1024", "--method", "random,range,fennel")
    want = _survey_cli(run_cli, tmp_path, tmp_path / "g.npz", "file", *common)
    got = _survey_cli(run_cli, tmp_path, tmp_path / "g.graph", "dir", *common)
    assert len(got["plans"][0]["traffic"]["pair_bytes"]) == 1024
    assert _same(want, got) == []


def test_survey_of_a_graph_dir_with_an_assignment_file(pair, run_cli, tmp_path):
    file, folder, g = pair
    a = (np.arange(g.num_vertices) * 7 % 5).astype(np.int32)
    np.save(tmp_path / "mine.npy", a)
    (tmp_path / "mine.txt").write_text("".join(f"{x}\n" for x in a))
    want = _survey_cli(run_cli, tmp_path, file, "file", "--assignment", tmp_path / "mine.npy")
    for name in ("mine.npy", "mine.txt"):
        got = _survey_cli(run_cli, tmp_path, folder, "dir", "--assignment", tmp_path / name)
        if name == "mine.npy":
            assert _same(want, got) == []
        assert got["plans"][0]["workers"] == 5


@pytest.mark.parametrize("ids, message", [
    ([0, 1, -1], "entry 2: negative worker id -1"),
    ([0, 2, 2], "worker 1 owns no vertex"),
    ([0, 9, 1], "worker 2 owns no vertex"),
])
def test_mapped_assignment_is_checked_as_the_in_memory_one(tmp_path, ids, message):
    path = tmp_path / "a.npy"
    np.save(path, np.array(ids, dtype=np.int64))
    for load in (load_assignment, load_assignment_mapped):
        with pytest.raises(InputError, match=message):
            load(path, 3)


def test_metis_refused_on_the_command_line(pair, run_cli):
    _, folder, _ = pair
    r = run_cli("survey", folder, "--method", "range,metis", "--workers", "4",
                "--memory-budget", "1M")
    assert r.returncode == 2 and "Traceback" not in r.stderr
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "METIS would need about" in lines[0]
    assert "random, range, fennel, ldg" in lines[0] and r.stdout == ""
    bad = run_cli("survey", folder, "--memory-budget", "lots")
    assert bad.returncode == 2 and "--memory-budget 'lots'" in bad.stderr
    vdata = run_cli("survey", folder, "--features", folder / "indptr.npy")
    assert vdata.returncode == 2 and "--features" in vdata.stderr


def test_split_refuses_metis_over_the_budget_and_writes_nothing(pair, run_cli, tmp_path):
    _, folder, _ = pair
    r = run_cli("split", folder, "--method", "metis", "--workers", "4", "--memory-budget",
                "1M", "--out", tmp_path / "shards")
    assert r.returncode == 2 and "METIS would need about" in r.stderr
    assert "Traceback" not in r.stderr and not (tmp_path / "shards").exists()


# ---------------------------------------------------------------- split

def _shard_dirs_equal(a: Path, b: Path) -> None:
    ma, mb = (json.loads((d / "shards.json").read_text()) for d in (a, b))
    ma["meta"].pop("source")
    mb["meta"].pop("source")
    assert ma == mb                                  # split id included: same shard contents
    for name in ma["files"]:
        with np.load(a / name, allow_pickle=False) as za, \
                np.load(b / name, allow_pickle=False) as zb:
            assert sorted(za.files) == sorted(zb.files)
            for key in za.files:
                x, y = za[key], zb[key]
                assert x.dtype == y.dtype and x.shape == y.shape, (name, key)
                np.testing.assert_array_equal(x, y, err_msg=f"{name} {key}")


@pytest.mark.parametrize("how", [("--method", "fennel", "--workers", "6"),
                                 ("--method", "metis", "--workers", "3"),
                                 ("--assignment", "mine.npy")])
def test_split_of_a_graph_dir_writes_the_shards_of_the_file(pair, run_cli, tmp_path, how):
    file, folder, g = pair
    np.save(tmp_path / "mine.npy", (np.arange(g.num_vertices) % 4).astype(np.int64))
    how = tuple(str(tmp_path / x) if x.endswith(".npy") else x for x in how)
    for graph, out in ((file, "from_file"), (folder, "from_dir")):
        r = run_cli("split", graph, *how, "--out", tmp_path / out)
        assert r.returncode == 0, r.stderr
    _shard_dirs_equal(tmp_path / "from_file", tmp_path / "from_dir")
    manifest = check_shard_dir(tmp_path / "from_dir")      # what a worker checks first
    assert load_shard(tmp_path / "from_dir", manifest["workers"] - 1).num_owned > 0
