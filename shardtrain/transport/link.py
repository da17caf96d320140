"""Link emulation: make the local pipes behave no faster than a described network link.

What is emulated, exactly (a forecast that models the same thing can be compared with a
measured run):
- Each worker has one full-duplex network interface of `gbps` Gbit/s. The frames a worker
  sends in one transport call (one `exchange`, or one all-reduce step) leave through it one
  after the other, in increasing peer rank; the whole frame counts (framing + payload).
- Frame i of a call may not finish arriving before
      t_start + latency_us * 1e-6 + 8 * (bytes of frames 0..i) / (gbps * 1e9)
  where t_start is when the call began. The sender holds back the frame's last byte until
  then (it sleeps the difference; if the real pipe was slower, nothing is added).
- Calls that overlap (a started exchange, `exchange_start`, still sending when the next call
  begins) share the one interface: a call's frames queue behind the frames of the calls
  before it, so t_start is the later of the call's start and the moment the interface has
  serialised every earlier frame (`Interface.schedule`). The sender holds a started
  exchange's last bytes back in the transport's progress thread, so the emulated transfer
  runs while the caller computes. For calls one after the other (every call blocking) this
  is the rule above unchanged.
- Receiver contention: the frames a worker receives in one call come in through the same
  interface (full duplex: its receiving side has the line rate of its sending side), one
  after the other. The call may not end before
      t_first + latency_us * 1e-6 + 8 * (bytes of all frames it received) / (gbps * 1e9)
  where t_first is when the first byte of any of its incoming frames was there (the call's
  start at the latest). When several peers send to one worker at once, their frames queue
  at its interface: `receive_due`. The receiver sleeps the difference at the end of the
  call (nothing is added when the real pipes were slower). For a started exchange
  t_first is the call's start, and the sleep is what is left of it at `wait()`, so it
  too runs while the caller computes.
- Not emulated: switch queues, packet loss, or any cost of the pipe itself beyond the
  max() above; a receiver that is busy computing when its first frame comes in starts its
  interface's clock when it looks (its call's start), which can only make the link slower.
- Profile: the sender's held-back time and the receiver's contention sleep count in the
  "exchange"/"allreduce" phase (transfer time on the emulated link); a receiver blocked
  waiting for a frame that is not yet due counts it as "wait", as it would for any slow peer.
So for a call that sends S bytes and receives R bytes in total, a worker's part ends no
earlier than latency + 8 max(S, R) / bandwidth after it started (when its peers started
with it), and a receiver cannot finish before its slowest sender's frame is due. The
forecast models the same (`forecast.projection.hop_wire_seconds`).
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass

from shardtrain.errors import ParameterError


@dataclass(frozen=True)
class LinkModel:
    gbps: float            # bandwidth of each worker's interface, Gbit/s (1e9 bit/s)
    latency_us: float = 0.0

    def __post_init__(self):
        if not (math.isfinite(self.gbps) and self.gbps > 0
                and math.isfinite(self.latency_us) and self.latency_us >= 0):
            raise ValueError(f"link needs gbps > 0 and latency_us >= 0, got {self}")

    def seconds(self, nbytes: int) -> float:
        """Serialisation time of `nbytes` on this link, without the latency."""
        return nbytes * 8 / (self.gbps * 1e9)

    def due_times(self, start: float, frame_bytes: list[int]) -> list[float]:
        """When each of the frames (sent back to back from `start`) may complete."""
        due, sent = [], 0
        for n in frame_bytes:
            sent += n
            due.append(start + self.latency_us * 1e-6 + self.seconds(sent))
        return due

    def receive_due(self, first_byte: float, received_bytes: int) -> float:
        """When a call that received `received_bytes` (framing + payload, all peers), the
        first of them there at `first_byte`, may end: its incoming frames share the
        receiving side of its interface, one after the other."""
        return first_byte + self.latency_us * 1e-6 + self.seconds(received_bytes)


class Interface:
    """One worker's emulated interface: the due times of each call's frames, the calls'
    frames queued one after the other (see the module docstring)."""

    def __init__(self, model: LinkModel):
        self.model = model
        self.free_at = 0.0        # when the interface has serialised every frame so far

    def schedule(self, start: float, frame_bytes: list[int]) -> list[float]:
        """Due times of a call's frames (back to back from max(start, free_at))."""
        begin = max(start, self.free_at)
        self.free_at = begin + self.model.seconds(sum(frame_bytes))
        return self.model.due_times(begin, frame_bytes)


_NUMBER = r"(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_LINK = re.compile(rf"^\s*({_NUMBER})\s*(?::\s*({_NUMBER})\s*)?$")


def parse_link(text: str, param: str = "emulate_link") -> LinkModel:
    """'GBPS[:LATENCY_US]' (e.g. '10', '0.1:50') -> LinkModel; ParameterError naming `param`."""
    m = _LINK.match(text or "")
    if not m:
        raise ParameterError(param, f"expected GBPS[:LATENCY_US] such as 10 or 0.1:50, "
                                    f"got {text!r}")
    gbps = float(m.group(1))
    latency = float(m.group(2)) if m.group(2) is not None else 0.0
    if not (math.isfinite(gbps) and gbps > 0):
        raise ParameterError(param, f"bandwidth must be a finite number above 0 Gbit/s, "
                                    f"got {text!r}")
    if not math.isfinite(latency):
        raise ParameterError(param, f"latency must be a finite number of microseconds >= 0, "
                                    f"got {text!r}")
    return LinkModel(gbps, latency)
