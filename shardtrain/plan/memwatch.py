"""Peak process memory as the issue counts it: RssAnon + RssShmem from /proc/self/status.

Pages of memory-mapped files (RssFile) belong to the page cache and can be dropped, so
they are reported beside the peak, not in it. /proc keeps no per-kind peak, so a daemon
thread samples the status file (every 20 ms by default) while the watch is open.
"""
from __future__ import annotations

import threading


def rss_now(pid: str = "self") -> dict[str, int]:
    """{"anon_shmem": RssAnon + RssShmem, "file": RssFile} in bytes, now (zeros off Linux)."""
    fields = {"RssAnon:": 0, "RssShmem:": 0, "RssFile:": 0}
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                parts = line.split()
                if parts and parts[0] in fields:
                    fields[parts[0]] = int(parts[1]) * 1024      # the file says kB
    except OSError:
        pass
    return {"anon_shmem": fields["RssAnon:"] + fields["RssShmem:"], "file": fields["RssFile:"]}


class MemoryWatch:
    """`with MemoryWatch() as w: ...` then w.peak (anon + shmem bytes) and w.peak_file."""

    def __init__(self, interval: float = 0.02):
        self.interval = interval
        self.peak = 0
        self.peak_file = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def sample(self) -> None:
        now = rss_now()
        self.peak = max(self.peak, now["anon_shmem"])
        self.peak_file = max(self.peak_file, now["file"])

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            self.sample()

    def __enter__(self) -> MemoryWatch:
        self.sample()
        self._thread = threading.Thread(target=self._run, name="memwatch", daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        self.sample()
