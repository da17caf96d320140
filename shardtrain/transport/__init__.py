"""The one small interface workers talk through; it knows nothing about GCNs.

`base.Transport` is the contract (`exchange`, `exchange_start` -> `base.ExchangeHandle`
with `wait`/`done`, `allreduce_sum`, `close`, `rank`, `size`, `profile`; its docstring lists
the promises). Implementations: `pipes.PipeTransport` (worker
processes on one machine), `mpi.MpiTransport` (mpi4py) and `loopback.LoopbackTransport`
(one process, nothing on a wire). `frames` is the wire format, `wire` what the
implementations share (the counting keys `KIND_HALO`, `KIND_ALLREDUCE`, `NO_LAYER`, and the
array and buffer checks), `ring` the all-reduce algorithm and its traffic, `link` the network
emulation, `meter` the byte counters and phase timers.
"""
from shardtrain.transport.base import ExchangeHandle, Transport
from shardtrain.transport.frames import FrameError
from shardtrain.transport.link import LinkModel, parse_link
from shardtrain.transport.ring import ring_chunks, ring_send_elements
from shardtrain.transport.wire import KIND_ALLREDUCE, KIND_HALO, NO_LAYER

__all__ = ["KIND_ALLREDUCE", "KIND_HALO", "NO_LAYER", "ExchangeHandle", "FrameError",
           "LinkModel", "Transport", "parse_link", "ring_chunks", "ring_send_elements"]
