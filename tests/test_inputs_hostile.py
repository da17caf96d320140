"""Hostile input files: tiny files that declare huge sizes, FIFOs and devices, the header rule,
self-loop counts, npz members that are not arrays, non-finite synth options.

Through the CLI every case exits 2 with exactly one line on stderr naming the file (and line)
or the option, no traceback, and nothing written. The CLI cases run under a 2 GiB
address-space limit: had anything of a declared size been allocated, the process would die
with a MemoryError traceback instead of the one-line refusal. To keep the suite fast, the
cases run one after another through `shardtrain.cli.main` in ONE limited interpreter (one
start-up instead of forty); two of them also go through `python -m shardtrain` on their own.
"""
from __future__ import annotations

import io
import json
import os
import re
import resource
import subprocess
import sys
import zipfile

import networkx as nx
import numpy as np
import pytest

from shardtrain.data import readers as sio
from shardtrain.data import textscan
from shardtrain.data.graph import csr_from_edges
from shardtrain.data.readers import load_graph
from shardtrain.errors import InputError
from shardtrain.files import save_npz_atomic

ADDRESS_SPACE = 2 << 30      # 2 GiB: far below any declared size here, enough for numpy/scipy
HUGE = 10 ** 12
TIMEOUT = 120                # a blocking open of a FIFO fails the test instead of hanging it


def _limit_address_space():
    resource.setrlimit(resource.RLIMIT_AS, (ADDRESS_SPACE, ADDRESS_SPACE))


def run_limited(*args, cwd):
    """`python -m shardtrain ARGS` with a 2 GiB address-space limit."""
    return subprocess.run([sys.executable, "-m", "shardtrain", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=TIMEOUT,
                          preexec_fn=_limit_address_space)


# runs each argv through the CLI's main() and reports (exit status, stderr); anything that
# escapes main() (a MemoryError, a bug, a case still busy after CASE_SECONDS, e.g. blocked
# opening a FIFO) is printed as a traceback into that case's stderr
CASE_SECONDS = 20
_BATCH = f"""
import contextlib, io, json, signal, sys, traceback
from shardtrain.cli import main

def too_slow(signum, frame):
    raise TimeoutError("case still running after {CASE_SECONDS} s")

signal.signal(signal.SIGALRM, too_slow)
results = []
for argv in json.load(sys.stdin):
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        try:
            signal.alarm({CASE_SECONDS})
            status = main(argv)
        except BaseException:
            traceback.print_exc()
            status = None
        finally:
            signal.alarm(0)
    results.append([status, err.getvalue()])
json.dump(results, sys.stdout)
"""


def run_batch(argvs: list[list[str]]) -> list[tuple[int | None, str]]:
    result = subprocess.run([sys.executable, "-c", _BATCH], input=json.dumps(argvs),
                            capture_output=True, text=True,
                            timeout=TIMEOUT + CASE_SECONDS * len(argvs),
                            preexec_fn=_limit_address_space)
    assert result.returncode == 0, result.stderr
    return [tuple(r) for r in json.loads(result.stdout)]


def assert_refused(status, stderr, folder, pattern):
    assert status == 2, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr and "MemoryError" not in stderr
    assert re.search(pattern, lines[0]), lines[0]
    assert not [p for p in os.listdir(folder) if p.startswith("out") or "tmp" in p]


def npy_header_only(path, shape, descr="<f4"):
    """An .npy file whose header declares `shape` but that holds no data (a few bytes)."""
    with open(path, "wb") as fh:
        np.lib.format.write_array_header_1_0(fh, {"descr": descr, "fortran_order": False,
                                                  "shape": shape})
    return path


def npy_bytes(shape, descr="<i8", data=b""):
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, {"descr": descr, "fortran_order": False,
                                               "shape": shape})
    return buf.getvalue() + data


def zip_members(path, members: dict):
    """An .npz (a zip of .npy members) written member by member, compressed."""
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as z:
        for name, data in members.items():
            z.writestr(name, data)
    return path


def survey_args(graph, folder, *extra):
    return ["survey", graph, "--workers", "2", "--method", "random", "--input-dim", "4",
            "--classes", "2", "--json", folder / "out.json", *extra]


def edge_list(d, text="0 1\n1 2\n"):
    (d / "g.txt").write_text(text)
    return d / "g.txt"


# --------------------------------------------------------------------------- the CLI cases
# (case id, make(folder) -> argv, pattern of the one stderr line)

def _npz_num_vertices(d):
    save_npz_atomic(d / "g.npz", edges=np.array([[0, 1]]), num_vertices=np.int64(HUGE))
    return survey_args(d / "g.npz", d)


def _npz_edges_header(d):
    # a compressed member whose header declares 10**12 edge rows (16 TB) and holds none
    return survey_args(zip_members(d / "g.npz", {"edges.npy": npy_bytes((HUGE, 2))}), d)


def _npz_mask_header(d):
    path = zip_members(d / "g.npz", {"edges.npy": npy_bytes((1, 2), data=bytes(16)),
                                     "train_mask.npy": npy_bytes((HUGE,), "|b1")})
    return survey_args(path, d)


def _features_header(d):
    return survey_args(edge_list(d), d, "--features", npy_header_only(d / "x.npy", (HUGE, 2)))


def _labels_header(d):
    return survey_args(edge_list(d), d, "--labels", npy_header_only(d / "y.npy", (HUGE,), "<i8"))


def _edge_list_big_id(d):
    return survey_args(edge_list(d, "0 1\n1 4000000000\n"), d)


def _mtx_big_size(d):
    (d / "g.mtx").write_bytes(b"%%MatrixMarket matrix coordinate pattern general\n"
                              b"1000000000 1000000000 1\n1 2\n")
    assert (d / "g.mtx").stat().st_size < 80
    return survey_args(d / "g.mtx", d)


def _mtx_many_entries(d):
    (d / "g.mtx").write_bytes(b"%%MatrixMarket matrix coordinate real symmetric\n"
                              b"% routes\n5 5 1000000000000\n1 2 1.0\n")
    return survey_args(d / "g.mtx", d)


def _assignment_header(d):
    return ["survey", edge_list(d), "--assignment", npy_header_only(d / "a.npy", (HUGE,), "<i8"),
            "--input-dim", "4", "--classes", "2", "--json", d / "out.json"]


def _synth(*options):
    return lambda d: ["synth", d / "out.npz", "--vertices", "50", *options]


def _special(make, role):
    suffix = {"graph": ".txt", "--features": ".csv", "--labels": ".txt", "--assignment": ".txt"}

    def setup(d):
        special = make(d / f"special{suffix[role]}")
        if role == "graph":
            return survey_args(special, d)
        if role == "--assignment":
            return ["survey", edge_list(d), "--assignment", special, "--input-dim", "4",
                    "--classes", "2", "--json", d / "out.json"]
        return survey_args(edge_list(d), d, role, special)
    return setup


def _fifo(path):
    os.mkfifo(path)
    return path


def _char_device(path):
    os.symlink("/dev/zero", path)     # endless zeros behind a graph-like name
    return path


def _npz_members(members):
    return lambda d: survey_args(zip_members(d / "g.npz", members), d)


def _structure_only(*extra):
    return lambda d: ["survey", edge_list(d, "0 1\n1 2\n2 3\n"), "--workers", "2", "--method",
                      "random", "--json", d / "out.json", *extra]


CLI_CASES = [
    # tiny files declaring huge sizes: refused before anything of that size is allocated
    ("npz num_vertices", _npz_num_vertices,
     r"g\.npz: 1,000,000,000,000 vertices and 1 edge rows: would need \S+ TiB of memory to load"),
    ("npz edges header", _npz_edges_header,
     r"g\.npz: 0 vertices and 1,000,000,000,000 edge rows: would need \S+ TiB of memory"),
    ("npz mask header", _npz_mask_header,
     r"g\.npz: 1,000,000,000,000 vertices and 1 edge rows: would need \S+ TiB of memory"),
    ("features npy header", _features_header,
     r"x\.npy: an array of shape \(1000000000000, 2\): would need \S+ TiB of memory to load"),
    ("labels npy header", _labels_header,
     r"y\.npy: an array of shape \(1000000000000,\): would need \S+ TiB of memory"),
    ("edge list id 4e9", _edge_list_big_id,
     r"g\.txt:2: vertex id 4,000,000,000 \(so 4,000,000,001 vertices\): would need \S+ GiB "
     r"of memory to load \(this process may use 2\.00 GiB of address space\)"),
    ("mtx 10^9 x 10^9", _mtx_big_size,
     r"g\.mtx:2: a 1,000,000,000 x 1,000,000,000 matrix with 1 entries: would need \S+ GiB "
     r"of memory to load"),
    ("mtx 10^12 entries", _mtx_many_entries,
     r"g\.mtx:3: declares 1,000,000,000,000 entries, but the 8 bytes after the size line "
     r"hold at most 2"),
    ("assignment npy header", _assignment_header,
     r"a\.npy: 1000000000000 worker ids for a graph of 3 vertices"),
    ("synth 10^12 vertices", lambda d: ["synth", d / "out.npz", "--vertices", str(HUGE)],
     r"--vertices 1000000000000 --avg-degree 10 --features 32: would need \S+ TiB of memory "
     r"to generate the network"),
    ("synth dense", _synth("--vertices", "100000", "--avg-degree", "99999"),
     r"--vertices 100000 --avg-degree 99999 --features 32: would need \S+ GiB"),
    # non-finite or out-of-range synth options, named at the option
    ("synth signal nan", _synth("--signal", "nan"), r"--signal nan: must be a finite number"),
    ("synth signal inf", _synth("--signal", "inf"), r"--signal inf: must be a finite number"),
    ("synth signal negative", _synth("--signal", "-0.5"),
     r"--signal -0\.5: must be between 0 and 1000"),
    ("synth signal huge", _synth("--signal", "1e300"),
     r"--signal 1e\+300: must be between 0 and 1000"),
    ("synth exponent nan", _synth("--degree-exponent", "nan"),
     r"--degree-exponent nan: must be a finite number"),
    ("synth exponent inf", _synth("--degree-exponent", "inf"),
     r"--degree-exponent inf: must be a finite number"),
    ("synth degree nan", _synth("--avg-degree", "nan"), r"--avg-degree nan: must be a finite"),
    ("synth homophily -inf", _synth("--homophily=-inf"), r"--homophily -inf: must be a finite"),
    ("synth seed negative", _synth("--seed", "-1"), r"--seed -1: must be >= 0"),
    # npz members that are not real .npy arrays
    ("npz member not an array", _npz_members({"edges.npy": b"hello, not an array"}),
     r"g\.npz: key 'edges': not a readable \.npy array"),
    ("npz member objects", _npz_members({"edges.npy": npy_bytes((2, 2), "|O")}),
     r"g\.npz: key 'edges': not a readable \.npy array without unpickling"),
    ("npz member truncated", _npz_members({"edges.npy": npy_bytes((5, 2), data=bytes(16))}),
     r"g\.npz: key 'edges': truncated: the header declares a int64 array of shape \(5, 2\)"),
    ("npz labels member", _npz_members({"edges.npy": npy_bytes((1, 2), data=bytes(16)),
                                        "labels.npy": b"\x93NU"}),
     r"g\.npz: key 'labels': not a readable \.npy array"),
    # the header rule: a first line with a number in it is data, here bad data
    ("first line 1e3", lambda d: survey_args(edge_list(d, "1e3 5\n1 2\n"), d),
     r"g\.txt:1: '1e3' is not an integer"),
    ("first line 0x10", lambda d: survey_args(edge_list(d, "0x10 5\n1 2\n"), d),
     r"g\.txt:1: '0x10' is not an integer"),
    # survey of a structure-only graph: every missing width in one line
    ("survey widths", _structure_only(),
     r"--input-dim, --classes: the graph has no features and no labels; give the input width "
     r"D >= 1 and the number of classes C >= 1"),
    ("survey one width", _structure_only("--classes", "3"),
     r"^shardtrain: error: --input-dim: the graph has no features; give"),
]
CLI_CASES.append(("fifo as split --assignment",
                  lambda d: ["split", edge_list(d), "--assignment", _fifo(d / "special.txt"),
                             "--out", d / "out"],
                  r"--assignment .*special\.txt: is a named pipe \(FIFO\), expected a regular"))
for _role in ("graph", "--features", "--labels", "--assignment"):
    _prefix = r"--assignment .*" if _role == "--assignment" else r""
    _suffix = ".csv" if _role == "--features" else ".txt"
    CLI_CASES.append((f"fifo as {_role}", _special(_fifo, _role),
                      _prefix + rf"special\{_suffix}: is a named pipe \(FIFO\), expected a "
                                rf"regular file"))
    CLI_CASES.append((f"char device as {_role}", _special(_char_device, _role),
                      _prefix + rf"special\{_suffix}: is a character device, expected a "
                                rf"regular file"))


@pytest.fixture(scope="module")
def cli_results(tmp_path_factory):
    """{case id: (exit status, stderr, folder)}, all cases run in one limited interpreter."""
    folders, argvs = [], []
    for i, (_, make, _) in enumerate(CLI_CASES):
        folder = tmp_path_factory.mktemp(f"case{i}")
        folders.append(folder)
        argvs.append([str(a) for a in make(folder)])
    results = run_batch(argvs)
    return {case[0]: (*result, folder)
            for case, result, folder in zip(CLI_CASES, results, folders)}


@pytest.mark.parametrize("case", CLI_CASES, ids=[c[0] for c in CLI_CASES])
def test_bad_input_through_the_cli_is_one_line_exit_2(cli_results, case):
    status, stderr, folder = cli_results[case[0]]
    assert_refused(status, stderr, folder, case[2])


@pytest.mark.parametrize("case", [c for c in CLI_CASES if c[0] in ("edge list id 4e9",
                                                                   "fifo as graph")],
                         ids=lambda c: c[0])
def test_the_real_entry_point_refuses_too(tmp_path, case):
    _, make, pattern = case
    result = run_limited(*make(tmp_path), cwd=tmp_path)
    assert_refused(result.returncode, result.stderr, tmp_path, pattern)


def test_estimate_is_close_to_the_measured_peak(tmp_path):
    """The loading estimate is neither below the real peak (a graph that fits would be
    refused... or one that does not, accepted) nor far above it; tracemalloc, which numpy
    reports its buffers to, measures the load."""
    import tracemalloc

    from shardtrain.data.memory import graph_load_bytes

    rng = np.random.default_rng(3)
    n, m = 20_000, 100_000
    save_npz_atomic(tmp_path / "g.npz", edges=rng.integers(0, n, size=(m, 2)), num_vertices=n,
                    labels=rng.integers(0, 4, n), features=rng.random((n, 8)).astype(np.float32))
    tracemalloc.start()
    load_graph(tmp_path / "g.npz")
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    estimate = graph_load_bytes(n, m, n * 8 * 4, labelled=True)     # float32 features
    assert peak <= estimate <= 1.5 * peak, (peak, estimate)


def test_synth_estimate_is_close_to_the_measured_peak():
    import tracemalloc

    from shardtrain.data.memory import synth_bytes
    from shardtrain.data.synth import edge_array, parcel_network

    for n, degree, features in [(20_000, 10, 8), (10_000, 4, 128)]:
        tracemalloc.start()
        edge_array(parcel_network(n, degree, 4, features, 0))
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        estimate = synth_bytes(n, n * degree // 2, features)
        assert peak <= estimate <= 1.5 * peak, (n, degree, features, peak, estimate)


@pytest.mark.parametrize("graph,role,missing", [
    ("g.txt", None, "g.txt"), ("g.mtx", None, "g.mtx"), ("g.npz", None, "g.npz"),
    ("e.txt", "features", "x.npy"), ("e.txt", "labels", "y.npy")])
def test_missing_file_of_every_kind_is_named(tmp_path, graph, role, missing):
    edge_list(tmp_path).rename(tmp_path / "e.txt")
    extra = {role: tmp_path / missing} if role else {}
    with pytest.raises(InputError, match=rf"{re.escape(missing)}: no such file"):
        load_graph(tmp_path / graph, **extra)


def test_truncated_npy_is_refused_without_reading(tmp_path):
    path = tmp_path / "x.npy"
    path.write_bytes(npy_bytes((1000, 2), "<f8", data=bytes(8)))
    with pytest.raises(InputError, match=r"x\.npy: truncated: the header declares a float64 "
                                         r"array of shape \(1000, 2\) \(16,000 bytes\) but 8"):
        sio.load_features(path)


# --------------------------------------------------------------------------- the header rule

def _scanner_only(monkeypatch):
    monkeypatch.setattr(textscan.TextTable, "_read_fast", lambda self: None)


@pytest.mark.parametrize("path_taken", ["loadtxt", "scanner"])
@pytest.mark.parametrize("first,edges,header", [
    ("0 1 # note", 3, None),                   # an inline comment: the edge is kept
    ("0 1 % note", 3, None),
    ("source target", 2, "'source target'"),   # no field looks like a number: a header
    ("from,to  # names", 2, "'from,to'"),
    ("+0 1", 3, None),                         # '+' is a sign, for both readers
])
def test_first_line_is_a_header_only_without_an_id_pair(tmp_path, monkeypatch, path_taken,
                                                        first, edges, header):
    if path_taken == "scanner":
        _scanner_only(monkeypatch)
    sep = "," if "," in first else " "
    path = tmp_path / "g.txt"
    path.write_text(f"{first}\n1{sep}2\n2{sep}3\n")
    loaded = load_graph(path)
    assert loaded.graph.num_edges == edges
    notes = [n for n in loaded.notes if "header" in n]
    if header is None:
        assert not notes
    else:
        assert notes == [f"{path}: skipped header line 1: {header}"]


@pytest.mark.parametrize("path_taken", ["loadtxt", "scanner"])
@pytest.mark.parametrize("first,token", [("1e3 5", "1e3"), ("0x10 5", "0x10"), ("1_0 5", "1_0"),
                                         ("src 5", "src"), ("0 1 2 # c", None)])
def test_first_line_with_a_number_is_data_or_an_error_naming_line_1(tmp_path, monkeypatch,
                                                                    path_taken, first, token):
    if path_taken == "scanner":
        _scanner_only(monkeypatch)
    path = tmp_path / "g.txt"
    path.write_text(f"# depots\n{first}\n1 2\n")
    message = (rf"'{token}' is not an integer" if token else r"expected 2 columns, found 3")
    with pytest.raises(InputError, match=rf"g\.txt:2: {message}"):
        load_graph(path)


@pytest.mark.parametrize("path_taken", ["loadtxt", "scanner"])
@pytest.mark.parametrize("option,lines,where", [
    ("graph", ["0,1", "1,,2"], r"g\.csv:2"),
    ("graph", [",0,1"], r"g\.csv:1"),
    ("features", ["volume,area,weight", "1.5,,2", "1,2,3"], r"x\.csv:2"),
    ("features", ["1, ,2", "1,2,3"], r"x\.csv:1"),
])
def test_empty_csv_field_is_an_error_not_a_column_shift(tmp_path, monkeypatch, path_taken,
                                                        option, lines, where):
    if path_taken == "scanner":
        _scanner_only(monkeypatch)
    name = "g.csv" if option == "graph" else "x.csv"
    (tmp_path / name).write_text("".join(f"{line}\n" for line in lines))
    graph = tmp_path / name if option == "graph" else edge_list(tmp_path, "0 1\n")
    extra = {} if option == "graph" else {"features": tmp_path / name}
    with pytest.raises(InputError, match=rf"{where}: empty field"):
        load_graph(graph, **extra)


def test_trailing_comma_loses_nothing_and_is_accepted(tmp_path):
    (tmp_path / "g.csv").write_text("0,1,\n1,2,\n")
    assert load_graph(tmp_path / "g.csv").graph.num_edges == 2


def test_too_long_ids_agree_between_the_readers(tmp_path, monkeypatch):
    """19 digits fit an int64 but not the scanner's 18-digit limit: both readers refuse, with
    the scanner's line-naming message (ids that long could never fit in memory anyway)."""
    path = tmp_path / "g.txt"
    path.write_text("0 1\n1 1234567890123456789\n")
    with pytest.raises(InputError, match=r"g\.txt:2: number too large"):
        load_graph(path)
    path.write_text("0 1\n1 -123456789012345678\n")      # 18 digits and a sign: negative id
    with pytest.raises(InputError, match=r"g\.txt:2: negative vertex id"):
        load_graph(path)
    _scanner_only(monkeypatch)
    with pytest.raises(InputError, match=r"g\.txt:2: negative vertex id"):
        load_graph(path)


# --------------------------------------------------------------------------- self-loops

def test_self_loops_are_counted_once_each_like_networkx(tmp_path):
    """124 loops, each written in both directions (as a symmetric export lists them), among
    ordinary edges with repeats: 124 self-loops, not 248 (networkx as the reference: its
    Graph keeps one loop per vertex, its MultiGraph every row)."""
    rng = np.random.default_rng(11)
    loops = np.repeat(np.arange(124), 2)
    others = rng.integers(0, 300, size=(600, 2))
    others = others[others[:, 0] != others[:, 1]]
    edges = np.concatenate([np.stack([loops, loops], axis=1), others])
    edges = edges[rng.permutation(edges.shape[0])]
    path = tmp_path / "g.txt"
    path.write_text("".join(f"{u} {v}\n" for u, v in edges))
    loaded = load_graph(path)
    simple, multi = nx.Graph(), nx.MultiGraph()
    simple.add_edges_from(map(tuple, edges))
    multi.add_edges_from(map(tuple, edges))
    assert nx.number_of_selfloops(multi) == 248          # the row count the note used to give
    assert loaded.cleanup.self_loops == nx.number_of_selfloops(simple) == 124
    assert loaded.cleanup.duplicates == edges.shape[0] - simple.number_of_edges()
    assert (loaded.cleanup.self_loops + loaded.cleanup.duplicates + loaded.graph.num_edges
            == edges.shape[0])
    assert any("dropped 124 self-loops" in n for n in loaded.notes)


def test_csr_from_edges_cleanup_matches_networkx_on_random_multigraphs():
    rng = np.random.default_rng(2)
    for _ in range(20):
        n = int(rng.integers(1, 12))
        edges = rng.integers(0, n, size=(int(rng.integers(0, 40)), 2))
        _, indices, cleanup = csr_from_edges(edges[:, 0], edges[:, 1], n)
        g = nx.Graph()
        g.add_nodes_from(range(n))
        g.add_edges_from(map(tuple, edges))
        assert cleanup.self_loops == nx.number_of_selfloops(g)
        assert cleanup.duplicates == edges.shape[0] - g.number_of_edges()
        assert indices.shape[0] // 2 == g.number_of_edges() - nx.number_of_selfloops(g)


# --------------------------------------------------------------------------- assignment text

def test_assignment_text_with_an_endless_line_names_it(tmp_path):
    from shardtrain.plan.partition import load_assignment

    path = tmp_path / "a.txt"
    path.write_text("0\n" + "1" * 100 + "\n")
    with pytest.raises(InputError, match=r"a\.txt:2: line longer than 64 bytes"):
        load_assignment(path, 2)
    path.write_text("0\n" * 1000)
    with pytest.raises(InputError, match=r"a\.txt: 2,000 bytes is too long for 2 worker ids"):
        load_assignment(path, 2)
