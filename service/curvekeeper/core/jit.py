"""``kernel``: numba's ``njit`` with an on-disk cache that cannot serve stale machine code.

numba checks a cached function against its own source file only, yet the machine code
of a kernel includes the kernels it calls from other modules (``learn_batch`` inlines
``detector_update`` from drift.py). So every kernel here caches under a directory named
by a hash of the source of the whole core package: any change to a core module moves
every kernel to a fresh directory, and old machine code is never looked at again.

The base directory is numba's ``NUMBA_CACHE_DIR`` when set, else the core package's own
``__pycache__``, else the user's cache directory; when none is writable the kernels
compile in memory only.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numba
from numba import njit

CORE_DIR = Path(__file__).resolve().parent
# numba makes its settings at run time from the environment: untyped to mypy
_numba_config: Any = numba.config

#: every dispatcher made by ``kernel``, by qualified name (for the warm-up and its checks)
KERNELS: dict[str, Any] = {}


def source_key(core_dir: Path = CORE_DIR) -> str:
    """Hex digest (16 chars) of the name and bytes of every ``*.py`` in the core package:
    compiled code may read any core module's functions and constants."""
    h = hashlib.sha256()
    for path in sorted(core_dir.glob("*.py")):
        h.update(path.name.encode() + b"\0" + path.read_bytes() + b"\0")
    return h.hexdigest()[:16]


def _writable(path: Path) -> bool:
    try:
        path.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=path):
            pass
    except OSError:
        return False
    return True


def _cache_bases() -> list[Path]:
    if _numba_config.CACHE_DIR:
        return [Path(_numba_config.CACHE_DIR)]
    home = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return [CORE_DIR / "__pycache__", Path(home) / "curvekeeper"]


def cache_dir(base: str | Path | None = None) -> Path | None:
    """The kernels' cache directory for this source (``<base>/kernels-<source_key>``),
    or None when no candidate base is writable."""
    bases = [Path(base)] if base is not None else _cache_bases()
    key = source_key()
    for b in bases:
        path = b / f"kernels-{key}"
        if _writable(path):
            return path
    return None


_CACHE_DIR = cache_dir()


def kernel(fn: Callable[..., Any]) -> Any:
    """``njit`` cached under ``cache_dir()``. numba fixes a function's cache location when
    it is decorated, so its ``CACHE_DIR`` setting is pointed there only meanwhile."""
    if _CACHE_DIR is None:
        disp = njit(cache=False)(fn)
    else:
        saved = _numba_config.CACHE_DIR
        _numba_config.CACHE_DIR = str(_CACHE_DIR)
        try:
            disp = njit(cache=True)(fn)
        finally:
            _numba_config.CACHE_DIR = saved
    KERNELS[f"{fn.__module__}.{fn.__qualname__}"] = disp
    return disp


def kernel_cache_dir() -> Path | None:
    """Where this process's kernels read and write machine code (None: memory only)."""
    return _CACHE_DIR


def specializations() -> int:
    """Compiled specialisations (compiled or loaded from the cache) over all kernels called
    from Python: it grows whenever a call compiles or loads machine code."""
    return sum(len(d.signatures) for d in KERNELS.values())
