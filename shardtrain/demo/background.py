"""A function run in a thread of this process, its result or error collected later."""
from __future__ import annotations

import threading


class Background:
    """fn(*args) in a daemon thread, so the single-process reference trains while the
    coordinator (whose thread only waits on pipes) runs the workers; `result()` joins and
    re-raises what fn raised. Daemon: a failed or interrupted demo does not wait for it."""

    def __init__(self, fn, *args):
        self._out: dict = {}
        self._thread = threading.Thread(target=self._run, args=(fn, args), daemon=True,
                                        name="shardtrain-demo-reference")
        self._thread.start()

    def _run(self, fn, args) -> None:
        try:
            self._out["value"] = fn(*args)
        except BaseException as exc:      # handed to the thread that calls result()
            self._out["error"] = exc

    def result(self):
        self._thread.join()
        if "error" in self._out:
            raise self._out["error"]
        return self._out["value"]
