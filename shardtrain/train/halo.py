"""Â_P's products on one shard over a transport: the halo kernels of a worker.

Per layer, the model calls two closures built here from the shard (see the layout CONTRACT
in `shardtrain/plan/shards.py`) and the transport:
- propagate(l, M): send M[send_to(q)] to every peer q, receive q's rows straight into
  their slice of a preallocated M_halo buffer, return Â_P [M; M_halo] (computed as
  A_oo M + A_oh M_halo, see HaloOps);
- propagate_t(l, G): Â_Pᵀ G has a row per owned AND halo column; the halo rows belong to
  their owners, so send (A_ohᵀ G)[halo_from(q)] back to q and add what each peer sends for
  my send rows at send_to(q) (indices are unique per peer) to A_ooᵀ G.
Under a halo scheme (`plan.schemes.HaloScheme`, not exact) the TRAINING exchanges go
through `_scheme_forward` / `_scheme_backward`: only the halo rows the receiver keeps this
epoch cross the wire (the sender derives them from the receiver's key), kept halo columns
are scaled by 1/P, and rows travel in the scheme's wire format (`train.compress`). The
evaluation forward is always the exact exchange.
Under a stale scheme (`HaloScheme.stale`, PipeGCN; definition in `plan/schemes.py`) the
training exchanges go through `_stale_forward` / `_stale_backward`: epoch t's rows leave
with `exchange_start` as soon as they are computed and the handle is waited for when epoch
t+1 needs them; epoch t computes with the rows epoch t-1 sent (the first epoch exchanges
synchronously and keeps its rows for the next). `finish()` waits for the last epoch's.
Every stale product first calls `done()` on the outstanding handles (`_poll`): under MPI a
large message moves only while the library is entered, so this lets it progress between
the model's kernels (setting MPIR_CVAR_ASYNC_PROGRESS=1 in mpich's environment gives it a
thread of its own instead).
"""
from __future__ import annotations

from typing import Callable

import numpy as np
import scipy.sparse as sp

from shardtrain.compat import add_csr_product
from shardtrain.plan.schemes import HaloScheme, halo_keep_mask, keep_epoch_used, keep_scale
from shardtrain.train import compress
from shardtrain.transport.base import Transport
from shardtrain.transport.wire import KIND_HALO

FORWARD, BACKWARD, EVAL = "forward", "backward", "eval"


class HaloOps:
    """propagate / propagate_t of one shard over a transport, with buffers reused per
    (layer, width): the halo rows received forward, the send blocks, the receive blocks.

    Â_P is kept split by columns into its owned block A_oo (n_owned x n_owned) and halo
    block A_oh (n_owned x n_halo), in the training dtype, with their transposes:
    - forward:  Z = A_oo M + A_oh M_halo, both accumulated into one fresh output, so M is
      never copied into a stacked [M; M_halo] and every row sums its entries in the same
      column order as Â_P [M; M_halo] would (the same bits);
    - backward: the halo rows A_ohᵀ G go to their owners first, then A_ooᵀ G is computed
      and the peers' contributions are added at the send rows.
    """

    def __init__(self, shard, transport: Transport, profile, dtype,
                 scheme: HaloScheme | None = None, seed: int = 0, adj=None):
        """`scheme`, `seed`: the halo scheme of the training exchanges (`plan.schemes`).
        `adj`: the operator to multiply by, of Â_P's shape and local columns (a model's
        `models.common.operator_matrix`); default the shard's Â_P."""
        self.shard, self.transport, self.profile = shard, transport, profile
        self.n_owned = shard.num_owned
        self.n_local = shard.num_owned + shard.num_halo
        self.dtype = np.dtype(dtype)
        with profile.phase("compute"):
            adj = (shard.adj if adj is None else adj).astype(self.dtype, copy=False)
            # (n_owned, n_owned + n_halo)
            adj = adj.tocsr() if adj.format != "csr" else adj
            self.adj_own = column_block(adj, 0, self.n_owned)
            self.adj_halo = column_block(adj, self.n_owned, self.n_local)
            del adj
            self.adj_own_t = transpose_csr(self.adj_own)        # once, not per hop
            self.adj_halo_t = self.adj_halo.T.tocsr()
        self.peers = shard.peers()
        self.send_idx = {q: shard.send_to(q) for q in self.peers}
        self.halo_rows = {q: shard.halo_from(q) for q in self.peers}
        with profile.phase("compute"):
            # out[send_to(q)] += received rows, as one pass of a 0/1 selection matrix (the
            # send rows are unique per peer, so each output row gets at most one 1.0 * x)
            self.scatter = {q: selection_matrix(self.send_idx[q], self.n_owned, self.dtype)
                            for q in self.peers}
        self.epoch = 0
        self.scheme = scheme if scheme is not None else HaloScheme()
        self.seed = int(seed)
        self.exact = self.scheme.exact(self.dtype)
        self.format = str(self.scheme.format) if self.scheme.compressed(self.dtype) else None
        self._choices: dict[int, tuple[dict, dict]] = {}   # epoch -> keep choices
        self._blocks: dict[tuple, np.ndarray] = {}
        self.on_phase: Callable[[str], None] = lambda text: None
        # stale halos: (direction, layer) -> the exchange epoch t-1 started (or the
        # warm-up's finished one), what epoch t uses; smoothing state per (direction, layer)
        self.first_epoch = 1
        self._pending: dict[tuple, _Sent] = {}
        self._smoothed: dict[tuple, object] = {}
        self._direct = not self.scheme.sampled and self.format is None

    def _block(self, key: tuple, rows: int, width: int) -> np.ndarray:
        buf = self._blocks.get(key)
        if buf is None or buf.shape != (rows, width):
            buf = self._blocks[key] = np.empty((rows, width), dtype=self.dtype)
        return buf

    def _send_blocks(self, layer: int, m: np.ndarray) -> dict[int, np.ndarray]:
        """M's send rows to every peer, gathered into reused (layer, width) buffers."""
        width = m.shape[1]
        outgoing = {}
        for q in self.peers:
            idx = self.send_idx[q]
            buf = self._block(("send", layer, width, q), idx.shape[0], width)
            outgoing[q] = np.take(m, idx, axis=0, out=buf)
        return outgoing

    def _exchange(self, outgoing: dict, incoming: dict, layer: int, direction: str) -> None:
        """One blocking halo exchange of this epoch, timed as the exchange phase."""
        with self.profile.phase("exchange"):
            self.transport.exchange(outgoing, incoming, kind=KIND_HALO, epoch=self.epoch,
                                    layer=layer, direction=direction)
        self.on_phase(f"epoch {self.epoch} compute")

    def propagate(self, direction: str) -> Callable[[int, np.ndarray], np.ndarray]:
        if direction == FORWARD and self.scheme.stale:
            return self._stale_forward
        if direction == FORWARD and not self.exact:
            return self._scheme_forward

        def propagate(layer: int, m: np.ndarray) -> np.ndarray:
            self.on_phase(f"epoch {self.epoch} {direction} exchange, layer {layer}")
            width = m.shape[1]
            with self.profile.phase("compute"):
                m = np.ascontiguousarray(m, dtype=self.dtype)
                outgoing = self._send_blocks(layer, m)
                halo = self._block(("halo", layer, width), self.n_local - self.n_owned,
                                   width)
                incoming = {q: halo[self.halo_rows[q]] for q in self.peers}
            self._exchange(outgoing, incoming, layer, direction)
            with self.profile.phase("compute"):
                z = np.zeros((self.n_owned, width), dtype=self.dtype)   # fresh: the model's
                add_csr_product(self.adj_own, m, z)
                add_csr_product(self.adj_halo, halo, z)
                return z
        return propagate

    def propagate_t(self, layer: int, g: np.ndarray) -> np.ndarray:
        if self.scheme.stale:
            return self._stale_backward(layer, g)
        if not self.exact:
            return self._scheme_backward(layer, g)
        self.on_phase(f"epoch {self.epoch} backward exchange, layer {layer}")
        width = g.shape[1]
        with self.profile.phase("compute"):
            g = np.ascontiguousarray(g, dtype=self.dtype)
            halo = self._block(("halo_t", layer, width), self.n_local - self.n_owned, width)
            halo.fill(0)
            add_csr_product(self.adj_halo_t, g, halo)          # rows owned by the peers
            outgoing = {q: halo[self.halo_rows[q]] for q in self.peers}
            incoming = {q: self._block(("recv", layer, width, q), self.send_idx[q].shape[0],
                                       width) for q in self.peers}
        self._exchange(outgoing, incoming, layer, BACKWARD)
        with self.profile.phase("compute"):
            out = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own_t, g, out)
            for q in self.peers:
                add_csr_product(self.scatter[q], incoming[q], out)
            return out

    # GAT multiplies by per-edge attention it computes itself: it needs the halo rows as
    # they are ([M; M_halo]) and hands back gradient rows for every local column.

    def gather(self, direction: str) -> Callable[[int, np.ndarray], np.ndarray]:
        """gather(l, M) -> [M; M_halo] (n_owned + n_halo rows, fresh), the halo rows
        received from their owners as `propagate` receives them."""
        def gather(layer: int, m: np.ndarray) -> np.ndarray:
            self.on_phase(f"epoch {self.epoch} {direction} exchange, layer {layer}")
            width = m.shape[1]
            with self.profile.phase("compute"):
                m = np.ascontiguousarray(m, dtype=self.dtype)
                out = np.empty((self.n_local, width), dtype=self.dtype)  # fresh: the model's
                out[:self.n_owned] = m
                halo = out[self.n_owned:]
                outgoing = self._send_blocks(layer, m)
                incoming = {q: halo[self.halo_rows[q]] for q in self.peers}
            self._exchange(outgoing, incoming, layer, direction)
            return out
        return gather

    def gather_t(self, layer: int, g: np.ndarray) -> np.ndarray:
        """G has n_owned + n_halo rows: send the halo rows G[n_owned:] back to their
        owners, return G's owned rows plus what the peers send for my send rows."""
        self.on_phase(f"epoch {self.epoch} backward exchange, layer {layer}")
        width = g.shape[1]
        with self.profile.phase("compute"):
            g = np.ascontiguousarray(g, dtype=self.dtype)
            halo = g[self.n_owned:]
            outgoing = {q: halo[self.halo_rows[q]] for q in self.peers}
            incoming = {q: self._block(("recv", layer, width, q), self.send_idx[q].shape[0],
                                       width) for q in self.peers}
        self._exchange(outgoing, incoming, layer, BACKWARD)
        with self.profile.phase("compute"):
            out = g[:self.n_owned].copy()
            for q in self.peers:
                add_csr_product(self.scatter[q], incoming[q], out)
            return out

    # ------------------------------------------------------------ under a halo scheme

    def _choice(self, epoch: int | None = None) -> tuple[dict, dict]:
        """The keep choices of `epoch` (default this epoch): (send rows to q that q keeps,
        positions in my halo I keep from q). Those of the last two epochs asked are kept."""
        epoch = self.epoch if epoch is None else int(epoch)
        cache = self._choices
        if epoch not in cache:
            sh, keep = self.shard, self.scheme.keep
            send = {}
            kept = {}
            for q in self.peers:
                idx = self.send_idx[q]
                send[q] = idx[halo_keep_mask(self.seed, epoch, q, sh.owned[idx], keep)]
                sl = self.halo_rows[q]
                pos = np.arange(sl.start, sl.stop)
                kept[q] = pos[halo_keep_mask(self.seed, epoch, sh.worker, sh.halo[pos],
                                             keep)]
            cache[epoch] = (send, kept)
            for old in [e for e in cache if e < epoch - 1]:
                del cache[old]
        return cache[epoch]

    def _encode(self, rows: np.ndarray, layer: int, direction: str, ids: np.ndarray):
        if self.format is None:
            return rows
        return compress.encode(rows, self.format, compress.RowKey(
            self.seed, self.epoch, layer, direction, self.shard.worker, ids))

    def _recv_block(self, rows: int, width: int) -> np.ndarray:
        if self.format is None:
            return np.empty((rows, width), dtype=self.dtype)
        return compress.wire_array(rows, width, self.format)

    def _decode(self, wire: np.ndarray, width: int) -> np.ndarray:
        if self.format is None:
            return wire
        return compress.decode(wire, self.format, width, self.dtype)

    def _scheme_forward(self, layer: int, m: np.ndarray) -> np.ndarray:
        self.on_phase(f"epoch {self.epoch} {FORWARD} exchange, layer {layer}")
        width = m.shape[1]
        with self.profile.phase("compute"):
            m = np.ascontiguousarray(m, dtype=self.dtype)
            send, kept = self._choice()
            owned = self.shard.owned
            outgoing = {q: self._encode(np.take(m, send[q], axis=0), layer, FORWARD,
                                        owned[send[q]]) for q in self.peers}
            incoming = {q: self._recv_block(kept[q].shape[0], width) for q in self.peers}
        self._exchange(outgoing, incoming, layer, FORWARD)
        with self.profile.phase("compute"):
            halo = np.zeros((self.n_local - self.n_owned, width), dtype=self.dtype)
            scale = self.dtype.type(keep_scale(self.scheme.keep))
            for q in self.peers:
                halo[kept[q]] = self._decode(incoming[q], width) * scale
            z = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own, m, z)
            add_csr_product(self.adj_halo, halo, z)
            return z

    def _scheme_backward(self, layer: int, g: np.ndarray) -> np.ndarray:
        self.on_phase(f"epoch {self.epoch} {BACKWARD} exchange, layer {layer}")
        width = g.shape[1]
        with self.profile.phase("compute"):
            g = np.ascontiguousarray(g, dtype=self.dtype)
            send, kept = self._choice()
            halo = np.zeros((self.n_local - self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_halo_t, g, halo)
            scale = self.dtype.type(keep_scale(self.scheme.keep))
            outgoing = {q: self._encode(halo[kept[q]] * scale, layer, BACKWARD,
                                        self.shard.halo[kept[q]]) for q in self.peers}
            incoming = {q: self._recv_block(send[q].shape[0], width) for q in self.peers}
        self._exchange(outgoing, incoming, layer, BACKWARD)
        with self.profile.phase("compute"):
            out = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own_t, g, out)
            for q in self.peers:
                out[send[q]] += self._decode(incoming[q], width)   # unique rows per peer
            return out


    # ------------------------------------------------------------ stale halos (PipeGCN)

    def _poll(self) -> None:
        """Let outstanding exchanges progress (MPI moves large messages only when the
        library is entered): a done() on each, between kernels."""
        for sent in self._pending.values():
            if sent.handle is not None:
                sent.handle.done()

    def _send_stale(self, key: tuple, outgoing: dict, incoming: dict, layer: int,
                    direction: str, rows: dict, halo=None) -> "_Sent":
        """Epoch t's exchange of `key`: synchronous in the first epoch (the warm-up),
        else started; returns what epoch t itself uses (the warm-up's, or epoch t-1's)."""
        sync = self.epoch <= self.first_epoch or key not in self._pending
        with self.profile.phase("exchange"):
            if sync:
                self.transport.exchange(outgoing, incoming, kind=KIND_HALO, epoch=self.epoch,
                                        layer=layer, direction=direction)
                handle = None
            else:
                handle = self.transport.exchange_start(
                    outgoing, incoming, kind=KIND_HALO, epoch=self.epoch, layer=layer,
                    direction=direction)
        mine = _Sent(handle, outgoing, incoming, rows, halo)
        used = mine if sync else self._pending[key]
        self._pending[key] = mine
        if used.handle is not None:
            with self.profile.phase("exchange"):
                used.handle.wait()
            used.handle = None
        used.outgoing = None              # sent: the arrays may go
        return used

    def _smooth(self, key: tuple, rows):
        """The moving average of stale rows (`HaloScheme.smooth`), or the rows themselves."""
        gamma = self.scheme.smooth
        if not gamma:
            return rows
        state = self._smoothed.get(key)
        if state is None:
            self._smoothed[key] = rows
            return rows
        g, h = self.dtype.type(gamma), self.dtype.type(1.0 - gamma)
        if isinstance(rows, dict):
            out: object = {q: g * state[q] + h * rows[q] for q in rows}   # type: ignore
        else:
            out = g * state + h * rows
        self._smoothed[key] = out
        return out

    def _stale_forward(self, layer: int, m: np.ndarray) -> np.ndarray:
        self.on_phase(f"epoch {self.epoch} {FORWARD} exchange, layer {layer}")
        self._poll()
        width = m.shape[1]
        n_halo = self.n_local - self.n_owned
        with self.profile.phase("compute"):
            m = np.ascontiguousarray(m, dtype=self.dtype)
            send, kept = self._choice(self.epoch)
            owned = self.shard.owned
            # fresh arrays each epoch: the started exchange sends from them in place
            outgoing = {q: self._encode(np.take(m, send[q], axis=0), layer, FORWARD,
                                        owned[send[q]]) for q in self.peers}
            halo = None
            if self._direct:
                halo = np.empty((n_halo, width), dtype=self.dtype)
                incoming = {q: halo[self.halo_rows[q]] for q in self.peers}
            else:
                incoming = {q: self._recv_block(kept[q].shape[0], width) for q in self.peers}
        used = self._send_stale((FORWARD, layer), outgoing, incoming, layer, FORWARD,
                                kept, halo)
        self.on_phase(f"epoch {self.epoch} compute")
        with self.profile.phase("compute"):
            if used.halo is not None:
                rows = used.halo
            else:
                rows = np.zeros((n_halo, width), dtype=self.dtype)
                scale = self.dtype.type(keep_scale(self.scheme.keep))
                for q in self.peers:
                    rows[used.rows[q]] = self._decode(used.incoming[q], width) * scale
            rows = self._smooth((FORWARD, layer), rows)
            z = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own, m, z)
            add_csr_product(self.adj_halo, rows, z)
            return z

    def _stale_backward(self, layer: int, g: np.ndarray) -> np.ndarray:
        self.on_phase(f"epoch {self.epoch} {BACKWARD} exchange, layer {layer}")
        self._poll()
        width = g.shape[1]
        with self.profile.phase("compute"):
            g = np.ascontiguousarray(g, dtype=self.dtype)
            # the halo this epoch's forward used: the keep set of epoch s(t)
            send, kept = self._choice(keep_epoch_used(self.epoch, True, self.first_epoch))
            halo = np.zeros((self.n_local - self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_halo_t, g, halo)
            if self._direct:
                outgoing = {q: halo[self.halo_rows[q]] for q in self.peers}
            else:
                scale = self.dtype.type(keep_scale(self.scheme.keep))
                outgoing = {q: self._encode(halo[kept[q]] * scale, layer, BACKWARD,
                                            self.shard.halo[kept[q]]) for q in self.peers}
            incoming = {q: self._recv_block(send[q].shape[0], width) for q in self.peers}
        used = self._send_stale((BACKWARD, layer), outgoing, incoming, layer, BACKWARD, send)
        self.on_phase(f"epoch {self.epoch} compute")
        with self.profile.phase("compute"):
            got = {q: self._decode(used.incoming[q], width) for q in self.peers}
            got = self._smooth((BACKWARD, layer), got)
            out = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own_t, g, out)
            for q in self.peers:
                if self._direct:
                    add_csr_product(self.scatter[q], got[q], out)
                else:
                    out[used.rows[q]] += got[q]             # unique rows per peer
            return out

    def finish(self) -> None:
        """Wait for the exchanges the last epoch started (their rows go unused)."""
        pending, self._pending = self._pending, {}
        with self.profile.phase("exchange"):
            for sent in pending.values():
                if sent.handle is not None:
                    sent.handle.wait()


class _Sent:
    """One stale exchange: its handle (None once finished), the arrays it sends from (kept
    alive until it is waited for), its receive buffers and the keep choice they follow
    (`rows`: forward, my kept halo positions per peer; backward, my send rows per peer);
    `halo`: the halo block the receives are views of (every row kept, no codec)."""

    def __init__(self, handle, outgoing, incoming, rows, halo=None):
        self.handle, self.outgoing, self.incoming = handle, outgoing, incoming
        self.rows, self.halo = rows, halo


def selection_matrix(rows: np.ndarray, n: int, dtype):
    """CSR (n, len(rows)) with a 1 at (rows[i], i): S @ X puts row i of X at rows[i]."""
    m = rows.shape[0]
    return sp.csr_matrix((np.ones(m, dtype=dtype), (rows, np.arange(m))), shape=(n, m))


def transpose_csr(a):
    """aᵀ as CSR, or `a` itself when a is symmetric bit for bit (Â's owned block is: its
    values are d_i^-1/2 d_j^-1/2), which saves a copy of the largest block."""
    t = a.T.tocsr()
    t.sort_indices()
    same = (np.array_equal(t.indptr, a.indptr) and np.array_equal(t.indices, a.indices)
            and np.array_equal(t.data, a.data))
    return a if same else t


def column_block(adj, lo: int, hi: int):
    """Columns lo..hi-1 of a CSR matrix with sorted indices, renumbered from 0 (CSR, the
    row order of entries kept)."""
    block = adj[:, lo:hi]
    return block.tocsr() if block.format != "csr" else block

