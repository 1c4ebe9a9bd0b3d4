"""The compiled kernels' build at start-up: in a thread, once per process, so the event
loop keeps answering (``/healthz``) while numba compiles or loads its cache, and
``/readyz`` says ready only once no request will wait for a compilation.

Compiling makes a great many objects, and a full collection of the cyclic garbage
collector over the whole heap holds the interpreter lock for a few hundred milliseconds:
during the build only the young generations are collected, and at its end the heap
(the imports and the compiled kernels' registries, with what little compile garbage got
old) is frozen, so later full collections scan only what serving makes. The thread switch
interval is shortened meanwhile so that the loop gets the lock back sooner.

Processes that share a cache directory (several workers, several instances on one
host) build one at a time under an exclusive lock on a file there: the first compiles
and writes the cache, the others then load it instead of compiling the same code.
"""

from __future__ import annotations

import fcntl
import gc
import logging
import sys
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Literal

from .channel_config import channel_config
from .core.jit import kernel_cache_dir
from .core.warmup import build_kernels

log = logging.getLogger("curvekeeper.kernels")

# the smallest channel of each learner: the kernels' types do not depend on the basis,
# the transform, the schedule or the detector (those are runtime codes and array sizes)
WARM_CHANNELS = (
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "learner": {"kind": "sgd"}},
    {"inputs": [{"name": "raw", "min": 0.0, "max": 1.0}], "learner": {"kind": "rls"}},
)


def warm_kernels() -> None:
    """Build (or load from the cache) every kernel a channel calls."""
    build_kernels(channel_config(body) for body in WARM_CHANNELS)


State = Literal["pending", "building", "ready", "failed"]
LOCK_NAME = "build.lock"


@contextmanager
def build_lock(cache_dir: Path | None) -> Iterator[None]:
    """Exclusive lock on ``cache_dir/build.lock`` (nothing to lock without a disk cache)."""
    if cache_dir is None:
        yield
        return
    with open(cache_dir / LOCK_NAME, "a+b") as f:
        fcntl.flock(f, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(f, fcntl.LOCK_UN)


@contextmanager
def young_collections_only() -> Iterator[None]:
    """No full garbage collection meanwhile; the surviving heap is frozen afterwards."""
    young, middle, old = gc.get_threshold()
    switch = sys.getswitchinterval()
    gc.set_threshold(young, middle, 1 << 30)
    sys.setswitchinterval(min(switch, 0.001))
    try:
        yield
    finally:
        sys.setswitchinterval(switch)
        gc.set_threshold(young, middle, old)
        gc.freeze()


class KernelBuild:
    """One build of the kernels: ``start()`` runs ``build`` in a daemon thread (once);
    ``state`` is pending, building, ready or failed (``error`` says why)."""

    def __init__(self, build: Callable[[], None] = warm_kernels, cache_dir: Path | None = None) -> None:
        self._build = build
        self._cache_dir = cache_dir if cache_dir is not None else kernel_cache_dir()
        self._lock = threading.Lock()
        self._done = threading.Event()
        self._thread: threading.Thread | None = None
        self.state: State = "pending"
        self.error: str | None = None

    @property
    def ready(self) -> bool:
        return self.state == "ready"

    def start(self) -> None:
        with self._lock:
            if self._thread is not None:
                return
            self.state = "building"
            self._thread = threading.Thread(target=self._run, name="curvekeeper-kernels", daemon=True)
            self._thread.start()

    def wait(self, timeout: float | None = None) -> bool:
        """Wait until the build ends (ready or failed); True when it is ready."""
        self._done.wait(timeout)
        return self.ready

    def _run(self) -> None:
        try:
            with build_lock(self._cache_dir), young_collections_only():
                self._build()
        except Exception as exc:  # the service still works (compiling on first use): say why not ready
            self.error = f"{type(exc).__name__}: {exc}"
            self.state = "failed"
            log.exception("building the compiled kernels failed")
        else:
            self.state = "ready"
            log.info("compiled kernels ready")
        finally:
            self._done.set()


#: the process's own build: the kernels, once compiled, serve every app in the process
PROCESS = KernelBuild()
