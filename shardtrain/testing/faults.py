"""Fault injection, FOR TESTS ONLY: make one worker fail at a chosen moment.

The coordinator reads the environment variable SHARDTRAIN_TEST_FAULT once per run (a
forkserver child inherits the server's environment, not the coordinator's current one, so
the coordinator passes the text on to the workers itself). Its form:

    W@PHASE=ACTION        e.g.  1@epoch 2 backward exchange=kill

Worker W performs ACTION the first time its phase text (see `worker_process.process_main`: "epoch
E forward exchange, layer L", "epoch E backward exchange, layer L", "epoch E all-reduce",
"epoch E compute", "epoch E checkpoint write", "epoch E checkpoint write, index not yet
renamed", ...) starts with PHASE. ACTION is one of
    kill              SIGKILL itself (as the kernel's OOM killer would)
    raise             raise an exception
    exit              leave with os._exit(7), without a word
    hang              stop answering (its peers' receives run into --timeout)
    pause:S           sleep S seconds, then go on
    corrupt:MODE      send every halo peer a bad frame, MODE one of truncated, oversized,
                      kind, source; then stop answering
SHARDTRAIN_TEST_PAUSE="PHASE=SECONDS" makes the train command itself sleep at one of its
`pause_point`s ("partitioning", "building shards", "shards built", "training"), after
writing "PHASE" into SHARDTRAIN_TEST_FAULT_STAMP when that is set, so a test can signal it
there.
With SHARDTRAIN_TEST_FAULT_STAMP=FILE the worker writes the wall-clock time (time.time())
of the fault into FILE first, so a test can measure how long detection took.
Never set these outside tests.
"""
from __future__ import annotations

import os
import signal
import time
from typing import TYPE_CHECKING, Any

from shardtrain.errors import InputError

if TYPE_CHECKING:
    from shardtrain.transport.pipes import PipeTransport

ENV = "SHARDTRAIN_TEST_FAULT"
ENV_STAMP = "SHARDTRAIN_TEST_FAULT_STAMP"
ENV_PAUSE = "SHARDTRAIN_TEST_PAUSE"
ACTIONS = ("kill", "raise", "exit", "hang", "pause", "corrupt")
CORRUPT_MODES = ("truncated", "oversized", "kind", "source")
HANG_S = 600.0                 # bounded even here: the coordinator stops it long before


def from_environment() -> dict | None:
    """The fault of this run as a plain dict (it travels to the worker), or None."""
    text = os.environ.get(ENV)
    if not text:
        return None
    return parse(text, stamp=os.environ.get(ENV_STAMP))


def parse(text: str, stamp: str | None = None) -> dict:
    try:
        who, rest = text.split("@", 1)
        phase, action = rest.rsplit("=", 1)
        name, _, arg = action.partition(":")
        spec = {"worker": int(who), "phase": phase, "action": name, "arg": arg,
                "stamp": stamp}
    except ValueError:
        raise InputError(f"{ENV} {text!r}: expected W@PHASE=ACTION") from None
    if name not in ACTIONS or (name == "corrupt" and arg not in CORRUPT_MODES):
        raise InputError(f"{ENV} {text!r}: unknown action {action!r}")
    return spec


class Fault:
    """Watches one worker's phases and fires the injected fault once."""

    def __init__(self, spec: dict | None, rank: int):
        self.spec = spec if spec is not None and spec["worker"] == rank else None
        self.transport: PipeTransport | None = None   # set by the worker once built

    def __call__(self, phase: str) -> None:
        spec = self.spec
        if spec is None or not phase.startswith(spec["phase"]):
            return
        self.spec = None
        if spec["stamp"]:
            with open(spec["stamp"], "w") as fh:
                fh.write(repr(time.time()))
        action, arg = spec["action"], spec["arg"]
        if action == "kill":
            os.kill(os.getpid(), signal.SIGKILL)
        elif action == "raise":
            raise RuntimeError(f"injected fault at {phase!r}")
        elif action == "exit":
            os._exit(7)
        elif action == "pause":
            time.sleep(float(arg))
        else:
            if action == "corrupt":
                self._corrupt(arg)
            time.sleep(HANG_S)

    def _corrupt(self, mode: str) -> None:
        """Write a bad frame straight onto the pipes to every peer (test-only: uses the
        pipe transport's descriptors)."""
        from shardtrain.transport import frames

        t = self.transport
        assert t is not None          # the worker attaches it before any exchange phase
        for q, fd in sorted(t._send_fd.items()):
            if mode == "truncated":
                os.write(fd, frames.PREFIX.pack(40)[:2])
                continue
            header: dict[str, Any] = {
                "kind": "halo", "epoch": 0, "layer": 0, "direction": "forward",
                "source": t.rank, "dtype": "float64", "shape": [1, 1]}
            if mode == "oversized":
                header["shape"] = [t.max_frame_bytes // 8 + 1]
            elif mode == "kind":
                header["kind"] = "bogus"
            else:
                header["source"] = (t.rank + 1) % t.size if t.size > 1 else t.rank + 1
            os.write(fd, frames.encode_header(**header))
        if mode == "truncated":     # the pipe closes mid-frame: the reader sees a truncated
            for conn in t._ends.send.values():       # frame (reads stay open, so a peer's
                conn.close()                          # send to us does not fail first)


def pause_point(phase: str) -> None:
    """TEST ONLY: sleep here when SHARDTRAIN_TEST_PAUSE names this phase (see above)."""
    text = os.environ.get(ENV_PAUSE)
    if not text:
        return
    name, _, seconds = text.rpartition("=")
    if name != phase:
        return
    stamp = os.environ.get(ENV_STAMP)
    if stamp:
        with open(stamp, "w") as fh:
            fh.write(phase)
    time.sleep(float(seconds))
