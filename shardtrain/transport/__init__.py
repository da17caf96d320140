"""The one small interface workers talk through; it knows nothing about GCNs.

A transport has `exchange(outgoing, incoming, *, kind, epoch, layer, direction)`,
`allreduce_sum(buf, *, epoch)` and `close()`, and counts every frame in a
`shardtrain.transport.meter.Profile`. Implementations: `pipes.PipeTransport` (one machine) and
`mpi.MpiTransport` (mpi4py). `frames` is the wire format, `ring` the all-reduce algorithm and
its traffic, `link` the network emulation.
"""
from shardtrain.transport.frames import FrameError
from shardtrain.transport.link import LinkModel, parse_link
from shardtrain.transport.ring import ring_chunks, ring_send_elements

__all__ = ["FrameError", "LinkModel", "parse_link", "ring_chunks", "ring_send_elements"]
