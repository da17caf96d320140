"""The one seam between the package and its test-only code (`shardtrain.testing`).

Fault injection and pause points are switched on by environment variables that only tests
set (SHARDTRAIN_TEST_FAULT, SHARDTRAIN_TEST_PAUSE; their forms are in
`shardtrain.testing.faults`). Without them nothing here imports the testing package, and no
other module of the package reaches it: the coordinator asks `fault_spec()`, each worker
watches its phases with `phase_watcher(spec, rank)`, the train command calls
`pause_point(name)`.
"""
from __future__ import annotations

import importlib
import os
from typing import Any, Protocol

FAULT_ENV = "SHARDTRAIN_TEST_FAULT"
PAUSE_ENV = "SHARDTRAIN_TEST_PAUSE"
_TESTING = "shardtrain.testing.faults"


def _testing() -> Any:
    return importlib.import_module(_TESTING)


def fault_spec() -> dict | None:
    """The injected fault of this run as a plain dict (it travels to the workers), or None."""
    if not os.environ.get(FAULT_ENV):
        return None
    return _testing().from_environment()


class PhaseWatcher(Protocol):
    transport: Any

    def __call__(self, phase: str) -> None: ...


class _NoFault:
    transport: Any = None

    def __call__(self, phase: str) -> None:
        return None


def phase_watcher(spec: dict | None, rank: int) -> PhaseWatcher:
    """A callable fed every phase text of worker `rank`; it fires `spec` when one matches.
    It has a `transport` attribute the worker sets once its transport is built."""
    if spec is None:
        return _NoFault()
    return _testing().Fault(spec, rank)


def pause_point(phase: str) -> None:
    """Sleep here when SHARDTRAIN_TEST_PAUSE names `phase` (tests signal the command there)."""
    if os.environ.get(PAUSE_ENV):
        _testing().pause_point(phase)
