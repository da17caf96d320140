"""`shardtrain ingest --sql` from PostgreSQL and from sqlite against `ingest` of the same edges
from a raw .npy file, side by side in one run: edges per second (rows / wall seconds of the
whole command), CPU seconds of the command and of the server, peak memory of the command's
process tree (RssAnon + RssShmem, as bench_ingest.py counts it).

    python benchmarks/bench_sql.py --out benchmarks/results/bench_sql.json \
        [--edges 20M] [--memory-budget 1G] [--skip-sqlite] [--skip-pg]

Goals (issue 16): PostgreSQL -> graph directory >= 1 M edges/s at 20 M edges, sqlite >= 0.5 M
edges/s. The PostgreSQL server is a throwaway cluster started here (initdb in a temporary
folder, a free local port; as the `postgres` or `nobody` user under root) on the same machine,
so its CPU competes with the ingest's on the same cores. The table is filled on the server
(`generate_series` with random ends over 1/10 as many depots as rows); sqlite gets the same
rows from numpy.
"""
from __future__ import annotations

import argparse
import glob
import json
import os
import pwd
import resource
import shutil
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_ingest import _tree  # noqa: E402  (the process tree, as bench_ingest walks it)


def _size(text: str) -> int:
    text = text.upper()
    mult = {"K": 10**3, "M": 10**6, "G": 10**9}.get(text[-1], 1)
    return int(float(text[:-1] if text[-1] in "KMG" else text) * mult)


def _status(pid: int) -> int:
    total = 0
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                if key in ("RssAnon", "RssShmem"):
                    total += int(value.split()[0]) * 1024
    except OSError:
        pass
    return total


def _server_cpu(server_pid: int | None) -> dict[int, float]:
    """CPU seconds of each process of the server's tree (postmaster and its backends)."""
    if server_pid is None:
        return {}
    tick = os.sysconf("SC_CLK_TCK")
    out = {}
    for p in _tree(server_pid):
        try:
            with open(f"/proc/{p}/stat") as fh:
                f = fh.read().rsplit(")", 1)[1].split()
            out[p] = (int(f[11]) + int(f[12])) / tick
        except OSError:
            pass
    return out


def run_measured(cmd: list[str], server_pid: int | None = None) -> dict:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    server_before = _server_cpu(server_pid)
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = [0]
    server: dict[int, float] = {}

    def sample():      # a backend's CPU leaves the tree with it: keep each process's last
        while proc.poll() is None:
            peak[0] = max(peak[0], sum(_status(p) for p in _tree(proc.pid)))
            server.update(_server_cpu(server_pid))
            time.sleep(0.02)

    t = threading.Thread(target=sample, daemon=True)
    t.start()
    out, err = proc.communicate()
    wall = time.perf_counter() - start
    t.join()
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed: {err.strip()}")
    return {"wall_s": wall, "cpu_s": (after.ru_utime - before.ru_utime)
            + (after.ru_stime - before.ru_stime),
            "server_cpu_s": sum(c - server_before.get(p, 0.0) for p, c in server.items()),
            "peak_tree_bytes": peak[0], "stdout": out.strip().splitlines()[-1:]}


def start_cluster(root: str) -> tuple[str, int, list[str], Path]:
    cands = [shutil.which("pg_ctl"), *sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"))]
    bindir = next((Path(c).resolve().parent for c in cands if c), None)
    if bindir is None:
        raise SystemExit("no PostgreSQL server binary found (apt-get install postgresql)")
    prefix: list[str] = []
    if os.geteuid() == 0:
        user = next(u for u in ("postgres", "nobody") if _has_user(u))
        prefix = ["runuser", "-u", user, "--"]
        shutil.chown(root, user=user)
    os.chmod(root, 0o755)
    subprocess.run(prefix + [str(bindir / "initdb"), "-D", f"{root}/data", "-U", "bench",
                             "--auth=trust", "--no-locale", "-E", "UTF8", "--no-sync"],
                   check=True, capture_output=True, cwd=root)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    opts = (f"-p {port} -k {root} -c listen_addresses=127.0.0.1 -c fsync=off "
            f"-c shared_buffers=256MB -c synchronous_commit=off")
    subprocess.run(prefix + [str(bindir / "pg_ctl"), "-D", f"{root}/data", "-o", opts, "-l",
                             f"{root}/log", "-w", "start"], check=True, capture_output=True,
                   cwd=root)
    pid = int(Path(f"{root}/data/postmaster.pid").read_text().split()[0])
    return f"postgresql://bench@127.0.0.1:{port}/postgres", pid, prefix, bindir


def _has_user(name: str) -> bool:
    try:
        pwd.getpwnam(name)
        return True
    except KeyError:
        return False


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--edges", default="20M")
    ap.add_argument("--memory-budget", default="1G")
    ap.add_argument("--skip-sqlite", action="store_true")
    ap.add_argument("--skip-pg", action="store_true")
    args = ap.parse_args()
    m = _size(args.edges)
    depots = max(2, m // 10)
    work = tempfile.mkdtemp(prefix="bench-sql-")
    shard = [sys.executable, "-m", "shardtrain", "ingest", "--memory-budget",
             args.memory_budget]
    result: dict = {"edges": m, "depots": depots, "memory_budget": args.memory_budget,
                    "load_before": os.getloadavg(), "cores": os.cpu_count(), "runs": {}}
    server = None
    try:
        rng = np.random.default_rng(16)
        e = rng.integers(0, depots, size=(m, 2), dtype=np.int64)
        np.save(f"{work}/e.npy", e)
        r = run_measured(shard + [f"{work}/e.npy", "--out", f"{work}/g-file"])
        result["runs"]["npy_file"] = r
        if not args.skip_sqlite:
            conn = sqlite3.connect(f"{work}/e.db")
            conn.execute("CREATE TABLE routes (a INTEGER, b INTEGER)")
            step = 1 << 20
            for s in range(0, m, step):
                conn.executemany("INSERT INTO routes VALUES (?, ?)", e[s:s + step].tolist())
            conn.commit()
            conn.close()
            r = run_measured(shard + ["--sql", f"sqlite:///{work}/e.db", "--edges-query",
                                      "SELECT a, b FROM routes", "--out", f"{work}/g-sqlite"])
            result["runs"]["sqlite"] = r
        if not args.skip_pg:
            root = tempfile.mkdtemp(prefix="bench-pg-")
            url, pid, prefix, bindir = start_cluster(root)
            server = (root, prefix, bindir)
            import psycopg
            with psycopg.connect(url) as c:
                c.execute(f"CREATE UNLOGGED TABLE routes AS SELECT (random() * {depots - 1})"
                          f"::int8 AS a, (random() * {depots - 1})::int8 AS b FROM "
                          f"generate_series(1, {m})")
            r = run_measured(shard + ["--sql", url, "--edges-query", "SELECT a, b FROM routes",
                                      "--out", f"{work}/g-pg"], server_pid=pid)
            result["runs"]["postgresql"] = r
        for name, r in result["runs"].items():
            r["edges_per_s"] = m / r["wall_s"]
        base = result["runs"]["npy_file"]["wall_s"]
        result["wall_ratio_to_npy"] = {k: r["wall_s"] / base for k, r in result["runs"].items()}
        goals = {}
        if "postgresql" in result["runs"]:
            goals["postgresql_1M_edges_per_s"] = result["runs"]["postgresql"]["edges_per_s"] >= 1e6
        if "sqlite" in result["runs"]:
            goals["sqlite_0.5M_edges_per_s"] = result["runs"]["sqlite"]["edges_per_s"] >= 5e5
        result["goals_met"] = goals
        result["load_after"] = os.getloadavg()
    finally:
        if server is not None:
            root, prefix, bindir = server
            subprocess.run(prefix + [str(bindir / "pg_ctl"), "-D", f"{root}/data", "-m",
                                     "immediate", "stop"], capture_output=True)
            shutil.rmtree(root, ignore_errors=True)
        shutil.rmtree(work, ignore_errors=True)
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(result, indent=1) + "\n")
    print(json.dumps({k: result[k] for k in ("edges", "goals_met", "wall_ratio_to_npy")}))
    for name, r in result["runs"].items():
        print(f"{name:12s} {r['wall_s']:7.2f} s  {r['edges_per_s'] / 1e6:5.2f} M edges/s  "
              f"CPU {r['cpu_s']:.1f} s (server {r['server_cpu_s']:.1f} s)  peak "
              f"{r['peak_tree_bytes'] / 2**20:.0f} MiB")


if __name__ == "__main__":
    main()
