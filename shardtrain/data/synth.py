"""The demo scenario: an invented regional parcel-delivery network.

Depots are vertices, daily truck routes between depots are undirected edges, each depot has a
vector of weekly volume and facility statistics (features), and its label is its role in the
network (ROLE_NAMES). The structure is a degree-corrected stochastic block model (Karrer &
Newman 2011) with power-law degree propensities; the features are a contextual SBM (Deshpande
et al. 2018): a class mean plus Gaussian noise, weak enough that a depot's own statistics only
moderately predict its role, while its routes (mostly to depots of the same role) reveal it.

Vertex ids are drawn independently of roles, so ids carry no community order: a partitioner
has to find the structure itself.
"""
from __future__ import annotations

import math

import numpy as np

from shardtrain import defaults
from shardtrain.data.graph import Graph, csr_from_edges
from shardtrain.data.memory import require_memory, synth_bytes
from shardtrain.data.readers import make_masks
from shardtrain.errors import ParameterError, option

ROLE_NAMES = ("hub", "urban", "suburban", "rural", "cross-dock", "returns", "airport",
              "port", "rail-terminal", "pickup-point", "cold-chain", "bulk")

_EDGE_CHUNK = 1 << 21    # routes drawn per batch: bounds scratch memory
_TOP_UP_ROUNDS = 8       # extra batches to replace self-loops and repeats


def role_name(label: int) -> str:
    """Role names cycle for more classes than names: 'hub', ..., 'bulk', 'hub-2', ..."""
    base = ROLE_NAMES[label % len(ROLE_NAMES)]
    lap = label // len(ROLE_NAMES)
    return base if lap == 0 else f"{base}-{lap + 1}"


def degree_propensities(n: int, avg_degree: float, exponent: float,
                        rng: np.random.Generator) -> np.ndarray:
    """Pareto(exponent - 1) propensities, so the degree tail P(k) ~ k^-exponent, capped at
    sqrt(sum theta) (the Chung & Lu 2002 condition that keeps edge probabilities <= 1)."""
    theta = (1.0 - rng.random(n)) ** (-1.0 / (exponent - 1.0))
    theta *= avg_degree / theta.mean()
    np.minimum(theta, np.sqrt(theta.sum()), out=theta)
    return theta


# a role signal this strong already separates the roles without error; far larger values
# only risk overflowing the float32 features
MAX_SIGNAL = 1000.0


def _check(vertices, avg_degree, classes, features, homophily, degree_exponent, signal,
           seed=0):
    """Refuse bad options at the door, then a network too large for this machine's memory."""
    _check_values(vertices, avg_degree, classes, features, homophily, degree_exponent, signal,
                  seed)
    routes = min(int(round(vertices * avg_degree / 2)), vertices * (vertices - 1) // 2)
    require_memory(synth_bytes(vertices, routes, features),
                   f"{option('vertices')} {vertices} {option('avg_degree')} {avg_degree:g} "
                   f"{option('features')} {features}",
                   what="generate the network")


def _check_values(vertices, avg_degree, classes, features, homophily, degree_exponent, signal,
                  seed=0):
    """Refuse bad options at the door, naming them: NaN and infinities included (every
    comparison with NaN is false, so each test is written to fail for it)."""
    for param, value in (("avg_degree", avg_degree), ("homophily", homophily),
                         ("degree_exponent", degree_exponent), ("signal", signal)):
        if not math.isfinite(value):
            raise ParameterError(param, "must be a finite number", value=value)
    if vertices < 2:
        raise ParameterError("vertices", "need at least 2", value=vertices)
    if not 0 < avg_degree <= vertices - 1:
        raise ParameterError("avg_degree", f"must be > 0 and at most vertices - 1 "
                                           f"({vertices - 1})", value=avg_degree)
    if not 1 <= classes <= vertices:
        raise ParameterError("classes", "must be between 1 and the number of vertices",
                             value=classes)
    if features < 1:
        raise ParameterError("features", "need at least 1", value=features)
    if not 0.0 <= homophily <= 1.0:
        raise ParameterError("homophily", "must be between 0 and 1", value=homophily)
    if not degree_exponent > 2.0:
        raise ParameterError("degree_exponent", "must be > 2 (finite mean degree)",
                             value=degree_exponent)
    if not 0.0 <= signal <= MAX_SIGNAL:
        raise ParameterError("signal", f"must be between 0 and {MAX_SIGNAL:g}", value=signal)
    if seed < 0:
        raise ParameterError("seed", "must be >= 0", value=seed)


class _RouteSampler:
    """Draws route endpoints: u with probability ~ theta; v from u's role with probability
    `homophily`, else from another role chosen by its share of theta; within a role, ~ theta.

    Inverse-CDF sampling with the uniforms drawn already sorted (exponential spacings, Renyi
    1953) so that searchsorted walks the cumulative weights in order, much faster than random
    queries (benchmarks/bench_load_synth.py times synth); a random permutation then undoes
    the order.
    """

    def __init__(self, labels, theta, classes, homophily, rng):
        self.rng, self.classes, self.homophily = rng, classes, homophily
        self.by_class = np.argsort(labels, kind="stable")
        self.label_sorted = labels[self.by_class]
        self.cum = np.cumsum(theta[self.by_class])
        mass = np.bincount(labels, weights=theta, minlength=classes)
        self.class_cum = np.cumsum(mass) / self.cum[-1]
        self.first = np.searchsorted(self.label_sorted, np.arange(classes), side="left")
        self.last = np.searchsorted(self.label_sorted, np.arange(classes), side="right") - 1

    def _sorted_uniform(self, count: int) -> np.ndarray:
        spacing = np.cumsum(self.rng.standard_exponential(count + 1))
        return spacing[:-1] / spacing[-1]

    def _pick(self, count: int, first: int, last: int) -> np.ndarray:
        """`count` positions in [first, last] of the class-sorted order, ~ theta, shuffled."""
        lo = self.cum[first - 1] if first > 0 else 0.0
        r = lo + self._sorted_uniform(count) * (self.cum[last] - lo)
        pos = np.searchsorted(self.cum, r, side="right")
        np.clip(pos, first, last, out=pos)   # rounding at the ends must not leave the range
        return pos[self.rng.permutation(count)]

    def _other_role(self, cu: np.ndarray) -> np.ndarray:
        """A role != cu for each entry, by theta share: redraw the few that hit their own role
        (a loop over attempts, not over routes). Stragglers (possible only when one role
        holds nearly all the weight) stay in their own role."""
        rng = self.rng
        pick = np.searchsorted(self.class_cum, rng.random(cu.shape[0]), side="right")
        for _ in range(16):
            same = np.flatnonzero(pick == cu)
            if same.shape[0] == 0:
                break
            pick[same] = np.searchsorted(self.class_cum, rng.random(same.shape[0]), side="right")
        pick = np.minimum(pick, self.classes - 1)
        return np.where(pick == cu, cu, pick)

    def draw(self, count: int) -> tuple[np.ndarray, np.ndarray]:
        pos_u = self._pick(count, 0, self.cum.shape[0] - 1)
        cu = self.label_sorted[pos_u]
        return self.by_class[pos_u], self.partners(cu)

    def partners(self, cu: np.ndarray) -> np.ndarray:
        """One endpoint per entry of the roles `cu`: in that role with probability
        `homophily`, else in another by its share of theta; within a role ~ theta."""
        count = cu.shape[0]
        cv = cu.copy()
        if self.classes > 1:
            cross = np.flatnonzero(self.rng.random(count) >= self.homophily)
            cv[cross] = self._other_role(cu[cross])
        order = np.argsort(cv, kind="stable")
        bounds = np.concatenate([[0], np.cumsum(np.bincount(cv, minlength=self.classes))])
        pos_v = np.empty(count, dtype=np.int64)
        for c in range(self.classes):   # loop over roles, not routes
            k = int(bounds[c + 1] - bounds[c])
            if k:
                pos_v[order[bounds[c]:bounds[c + 1]]] = self._pick(k, int(self.first[c]),
                                                                   int(self.last[c]))
        return self.by_class[pos_v]


def _route_keys(sampler: _RouteSampler, n: int, target: int, rng) -> np.ndarray:
    """Exactly `target` distinct undirected routes (fewer only if the model cannot give more),
    as sorted keys lo * n + hi."""
    keys = np.zeros(0, dtype=np.int64)
    want = target
    for _ in range(_TOP_UP_ROUNDS + 1):
        batch = []
        for start in range(0, want, _EDGE_CHUNK):
            u, v = sampler.draw(min(_EDGE_CHUNK, want - start))
            keep = u != v
            lo, hi = np.minimum(u[keep], v[keep]), np.maximum(u[keep], v[keep])
            batch.append(lo * np.int64(n) + hi)
        keys = np.sort(np.concatenate([keys, *batch]))
        keys = keys[np.concatenate([[True], keys[1:] != keys[:-1]])] if keys.shape[0] else keys
        missing = target - keys.shape[0]
        if missing <= 0:
            break
        want = int(missing * 1.2) + 16
    if keys.shape[0] > target:
        keys = np.sort(rng.choice(keys, size=target, replace=False))
    return keys


def parcel_network(vertices: int, avg_degree: float, classes: int, features: int, seed: int,
                   *, homophily: float = defaults.HOMOPHILY,
                   degree_exponent: float = defaults.DEGREE_EXPONENT,
                   signal: float = defaults.SIGNAL) -> Graph:
    """The parcel network as a Graph with features (float32), labels and split masks.

    About vertices * avg_degree / 2 distinct routes; `homophily` is the expected fraction of
    routes joining depots of the same role; class means have Euclidean norm about `signal`
    against unit-variance noise per feature. Deterministic for a seed.
    """
    _check(vertices, avg_degree, classes, features, homophily, degree_exponent, signal,
           seed)
    rng = np.random.default_rng(seed)
    n = int(vertices)
    # role shares are unequal (a few hubs, many local depots), drawn from the seed
    share = rng.dirichlet(np.full(classes, 4.0))
    labels = rng.choice(classes, size=n, p=share).astype(np.int64)
    theta = degree_propensities(n, avg_degree, degree_exponent, rng)
    sampler = _RouteSampler(labels, theta, classes, homophily, rng)
    target = min(int(round(n * avg_degree / 2)), n * (n - 1) // 2)
    keys = _route_keys(sampler, n, target, rng)
    lo, hi = np.divmod(keys, np.int64(n))
    del keys
    indptr, indices, _ = csr_from_edges(lo, hi, n)
    del lo, hi
    means = rng.standard_normal((classes, features)) * (signal / np.sqrt(features))
    x = rng.standard_normal((n, features), dtype=np.float32)
    x += means.astype(np.float32)[labels]
    train, val, test = make_masks(labels, seed)
    return Graph(indptr, indices, x, labels, train, val, test)


# --------------------------------------------------------------------------- growth

def _check_growth(weeks: int, growth: float) -> None:
    if not isinstance(weeks, int) or not 1 <= weeks <= 520:
        raise ParameterError("grow", "must be a number of weeks from 1 to 520", value=weeks)
    if not (math.isfinite(growth) and 0.0 < growth <= 1.0):
        raise ParameterError("growth", "must be a rate in (0, 1], e.g. 0.05", value=growth)


def grow_parcel_network(graph: Graph, weeks: int, growth: float, seed: int, *,
                        homophily: float = defaults.HOMOPHILY) -> list[dict]:
    """`weeks` weekly deltas of a growing parcel network, each against the network after
    the weeks before it: {"vertices": {features, labels, train_mask, val_mask, test_mask},
    "edges": (r, 2) int64 routes, new ids after the current ones}.

    Each week about `growth` x n new depots open, each with max(1, Poisson(d/2)) routes (d
    the current mean routes per depot) to existing depots chosen by preferential attachment
    (Barabási & Albert 1999): probability ~ routes + 1, so busy regions attract the new
    depots, in the depot's own role with probability `homophily` (as in `parcel_network`);
    and round(growth x m / 2) new routes join existing depots, both ends ~ routes + 1 (the
    second end by role as above). Roles follow the current role shares; a new depot's
    statistics are its role's current mean plus unit noise, float32 as the network's. New
    depots are in no training or validation split (they are what gets predicted: test if
    labelled). Routes already present, loops and repeats are left out, so every row of a
    delta changes the network. Deterministic for a seed; vectorised per week.
    """
    _check_growth(weeks, growth)
    if graph.labels is None or graph.features is None:
        raise ParameterError("grow", "needs a network with roles and statistics")
    deltas = []
    labels, x = graph.labels, graph.features
    indptr, indices = graph.indptr, graph.indices
    classes = int(labels.max()) + 1
    for week in range(1, weeks + 1):
        rng = np.random.default_rng([seed, 15, week])
        n = indptr.shape[0] - 1
        m = indices.shape[0] // 2
        degree = np.diff(indptr)
        sampler = _RouteSampler(labels, degree + 1.0, classes, homophily, rng)
        n_add = max(1, int(round(growth * n)))
        share = np.bincount(labels, minlength=classes) / n
        new_labels = rng.choice(classes, size=n_add, p=share).astype(np.int64)
        counts = np.bincount(labels, minlength=classes)
        means = np.zeros((classes, x.shape[1]))
        np.add.at(means, labels, x.astype(np.float64))
        means /= np.maximum(counts, 1)[:, None]
        new_x = (means[new_labels] + rng.standard_normal((n_add, x.shape[1]))).astype(x.dtype)
        routes_per = np.maximum(1, rng.poisson(m / n, size=n_add))      # d/2 = m/n
        src = np.repeat(np.arange(n, n + n_add, dtype=np.int64), routes_per)
        dst = sampler.partners(np.repeat(new_labels, routes_per))
        u, v = sampler.draw(int(round(growth * m / 2)))
        src, dst = np.concatenate([src, u]), np.concatenate([dst, v])
        lo, hi = np.minimum(src, dst), np.maximum(src, dst)
        n_new = n + n_add
        key = np.sort((lo * np.int64(n_new) + hi)[lo != hi])
        key = key[np.concatenate([[True], key[1:] != key[:-1]])] if key.shape[0] else key
        rows = np.repeat(np.arange(n, dtype=np.int64), degree)
        old = rows * np.int64(n_new) + indices
        at = np.minimum(np.searchsorted(old, key), max(old.shape[0] - 1, 0))
        if old.shape[0]:
            key = key[old[at] != key]
        lo, hi = np.divmod(key, np.int64(n_new))
        empty = np.zeros(n_add, dtype=bool)
        deltas.append({"vertices": {"features": new_x, "labels": new_labels,
                                    "train_mask": empty, "val_mask": empty,
                                    "test_mask": np.ones(n_add, dtype=bool)},
                       "edges": np.stack([lo, hi], axis=1)})
        labels = np.concatenate([labels, new_labels])
        x = np.concatenate([x, new_x])
        all_rows = np.concatenate([rows, lo, hi])
        all_cols = np.concatenate([indices, hi, lo])
        order = np.argsort(all_rows * np.int64(n_new) + all_cols, kind="stable")
        indices = all_cols[order]
        indptr = np.zeros(n_new + 1, dtype=np.int64)
        np.cumsum(np.bincount(all_rows, minlength=n_new), out=indptr[1:])
    return deltas


def edge_array(graph: Graph) -> np.ndarray:
    """Each undirected edge once, as an (m, 2) int64 array with u < v."""
    rows = np.repeat(np.arange(graph.num_vertices, dtype=np.int64), graph.degrees)
    upper = rows < graph.indices
    return np.stack([rows[upper], graph.indices[upper]], axis=1)


def same_role_fraction(graph: Graph) -> float:
    """Fraction of edges joining vertices of the same label (edge homophily)."""
    assert graph.labels is not None         # called on synthesised graphs, always labelled
    rows = np.repeat(np.arange(graph.num_vertices), graph.degrees)
    if rows.shape[0] == 0:
        return 0.0
    return float(np.mean(graph.labels[rows] == graph.labels[graph.indices]))


# --------------------------------------------------------------------------- streaming

_FEATURE_BLOCK = 1 << 18   # feature rows drawn per block: bounds scratch memory


class ParcelStream:
    """The parcel network of `parcel_network`, drawn in pieces for graphs larger than memory.

    The same generator family and parameters (roles from a Dirichlet share, power-law
    propensities, routes from `_RouteSampler`, class-mean features, the Kipf & Welling split),
    but not the same draws: the in-memory version tops its routes up to an exact count of
    distinct routes, this one draws a few more routes than that in chunks (`route_chunks`,
    the excess estimated by `draws_needed`) and leaves repeats to the sort that builds the
    CSR (`data.ingest`), so the route count is close to, not exactly, the in-memory one.
    Feature rows are drawn per block of vertices from a generator keyed by (seed, block), so
    any block can be made on its own and in any order.

    Memory: O(n) small arrays (labels int16, positions int32 while n < 2**31, propensity sums
    float64) and O(chunk) scratch; no O(m) array.
    """

    def __init__(self, vertices: int, avg_degree: float, classes: int, features: int,
                 seed: int, *, homophily: float = 0.8, degree_exponent: float = 2.5,
                 signal: float = 1.5):
        _check_values(vertices, avg_degree, classes, features, homophily, degree_exponent,
                      signal, seed)
        self.num_vertices, self.classes, self.features, self.seed = (
            int(vertices), int(classes), int(features), int(seed))
        n = self.num_vertices
        rng = np.random.default_rng(seed)
        share = rng.dirichlet(np.full(classes, 4.0))
        label_type = np.int16 if classes < 2**15 else np.int64
        self.labels = rng.choice(classes, size=n, p=share).astype(label_type)
        theta = degree_propensities(n, avg_degree, degree_exponent, rng)
        self._sampler = _RouteSampler(self.labels, theta, classes, homophily, rng)
        del theta
        if n < 2**31:                         # positions fit int32: half the memory
            self._sampler.by_class = self._sampler.by_class.astype(np.int32)
        self.target_routes = min(int(round(n * avg_degree / 2)), n * (n - 1) // 2)
        self._means = (rng.standard_normal((classes, features))
                       * (signal / np.sqrt(features))).astype(np.float32)

    def draws_needed(self, pilot: int = _EDGE_CHUNK) -> int:
        """Routes to draw so that about `target_routes` stay distinct. The in-memory version
        tops up after deduplicating, which a stream cannot do; instead a pilot sample of
        `pilot` draws (its own generator, keyed by the seed) measures the repeat fraction f
        there. Repeats grow about linearly with the number of draws while they are rare (each
        new draw meets a pair already drawn with probability ~ draws x sum p_uv^2), so at the
        target the fraction is about f x target / pilot, and we draw target / (1 - that)."""
        target = self.target_routes
        pilot = min(pilot, target)
        if pilot < 2:
            return target
        saved, self._sampler.rng = self._sampler.rng, np.random.default_rng([self.seed, 2])
        try:
            u, v = self._sampler.draw(pilot)
        finally:
            self._sampler.rng = saved
        keep = u != v
        n = np.int64(self.num_vertices)
        keys = np.sort(np.minimum(u[keep], v[keep]).astype(np.int64) * n
                       + np.maximum(u[keep], v[keep]))
        repeats = int(np.count_nonzero(keys[1:] == keys[:-1]))
        fraction = min(0.5, repeats / pilot * target / pilot)
        return int(round(target / (1.0 - fraction)))

    def route_chunks(self, chunk: int = _EDGE_CHUNK):
        """(lo, hi) int64 arrays of `draws_needed()` routes in all, lo < hi (no loops;
        repeats possible: the sort that builds the CSR drops them), `chunk` draws at a
        time."""
        total = self.draws_needed()
        # a generator of its own, keyed by the seed: every call draws the same routes (the
        # ingest reads its sources twice)
        self._sampler.rng = np.random.default_rng([self.seed, 3])
        for start in range(0, total, chunk):
            u, v = self._sampler.draw(min(chunk, total - start))
            keep = u != v
            u, v = u[keep].astype(np.int64), v[keep].astype(np.int64)
            yield np.minimum(u, v), np.maximum(u, v)

    def feature_rows(self, start: int, stop: int) -> np.ndarray:
        """Features of vertices start..stop-1 (float32), the same whichever blocks are asked:
        each _FEATURE_BLOCK-row block has its own generator keyed by (seed, block)."""
        if not 0 <= start <= stop <= self.num_vertices:
            raise ValueError(f"feature_rows({start}, {stop}): outside 0..{self.num_vertices}")
        out = np.empty((stop - start, self.features), dtype=np.float32)
        first = start // _FEATURE_BLOCK
        for block in range(first, (stop - 1) // _FEATURE_BLOCK + 1 if stop > start else first):
            lo = block * _FEATURE_BLOCK
            hi = min(lo + _FEATURE_BLOCK, self.num_vertices)
            rng = np.random.default_rng([self.seed, 1, block])
            x = rng.standard_normal((hi - lo, self.features), dtype=np.float32)
            x += self._means[self.labels[lo:hi]]
            a, b = max(start, lo), min(stop, hi)
            out[a - start:b - start] = x[a - lo:b - lo]
        return out

    def masks(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(train, val, test) by the same protocol and seed as `parcel_network`."""
        return make_masks(self.labels.astype(np.int64), self.seed)


class _FeatureRows:
    """The stream's features as the (n, d) float32 array ingest copies in row slices."""

    def __init__(self, stream: ParcelStream):
        self.stream = stream
        self.shape = (stream.num_vertices, stream.features)
        self.dtype = np.dtype(np.float32)
        self.ndim = 2

    def __getitem__(self, rows: slice) -> np.ndarray:
        start, stop, _ = rows.indices(self.shape[0])
        return self.stream.feature_rows(start, stop)


def write_parcel_dir(stream: ParcelStream, out, *, budget: int, overwrite: bool = False,
                     progress=None):
    """Write the streamed network as a graph directory through ingest's external sort
    (routes drawn twice, once per pass, the same both times; features, labels and masks
    copied in row chunks). Returns ingest's `IngestResult`."""
    from pathlib import Path

    from shardtrain.data import ingest as ing

    class _Parcel(ing.Source):
        declared_n = stream.num_vertices

        def chunks(self, budget_plan):
            # a fixed chunk, not one from the budget: the draws (so the graph) depend on it
            where = f"{self.path}"
            for lo, hi in stream.route_chunks(chunk=_EDGE_CHUNK):
                yield ing.EdgeChunk(lo, hi, lambda row: f"{where}: route {row}")

    source = _Parcel(Path(f"synth:parcel-network(seed={stream.seed})"))
    train, val, test = stream.masks()
    source.vertex = ing.VertexData(
        features=_FeatureRows(stream), features_where="synth features",
        labels=stream.labels, labels_where="synth labels",
        masks={"train_mask": train, "val_mask": val, "test_mask": test},
        masks_where="synth masks")
    return ing.ingest([source], out, budget=budget, overwrite=overwrite,
                      progress=progress or ing.no_progress)
