"""The one jit decorator of grmc, and where its compiled code is cached.

Every compiled function of the engine is decorated with :data:`jit` (or, for the small
steps of a loop, :data:`step` or :data:`inline_step`): nopython mode, the GIL
released (``nogil=True``, so threads can run trajectories side by side), fastmath OFF (the
plain-Python oracle must reproduce every floating-point operation bit for bit), numpy's error
model (a division by zero gives inf instead of a Python exception; the kernels never divide
by zero, and the check would cost a branch in the event loop) and on-disk caching.

Caching
-------
numba writes its cache next to the source file (``grmc/engine/__pycache__``) or into
``NUMBA_CACHE_DIR``; when it finds no writable place it raises at decoration time, i.e. when
the kernels module is imported.  Installed read-only (a system site-packages, a container
image) that would make the engine unusable.  So, BEFORE numba is imported, this module picks
the first writable directory of

1. ``NUMBA_CACHE_DIR`` if set,
2. the package's own ``grmc/engine/__pycache__`` (numba's default),
3. ``$XDG_CACHE_HOME/grmc/numba`` (default ``~/.cache/grmc/numba``),
4. ``<tempfile.gettempdir()>/grmc-numba-<uid>`` (created private to the user; refused when it
   exists and belongs to someone else or is writable by others, since numba's cache holds
   pickled data),

and, when it is 3 or 4, points ``NUMBA_CACHE_DIR`` there (numba itself skips an unwritable
``NUMBA_CACHE_DIR`` and falls back to 2).  When none is writable, caching is switched off
(every process then compiles, a few seconds).  :data:`CACHE_DIR` and :data:`CACHE_ENABLED`
record the outcome.

numba checks a cached function against its own source file only: the kernels in
``kernels.py`` embed the generator of ``rng.py`` and read the records of ``tables.py``, so
after editing ``rng.py`` or the records' fields in ``tables.py`` delete the cache
(``grmc/engine/__pycache__/*.nbi``, ``*.nbc``, or the directory above) by hand.
"""

from __future__ import annotations

import os
import stat
import sys
import tempfile
from collections.abc import Callable, Iterable
from pathlib import Path

__all__ = ["CACHE_DIR", "CACHE_ENABLED", "is_writable_dir", "jit", "inline_step",
           "select_cache_dir", "step"]

_ENGINE_DIR = Path(__file__).resolve().parent
_IN_TREE = _ENGINE_DIR / "__pycache__"


def is_writable_dir(path: str | os.PathLike, *, private: bool = False) -> bool:
    """Whether ``path`` is (or can be created as) a directory we can write files into.

    The test is the one numba applies itself: create the directory if needed and create
    (then delete) a temporary file in it.

    Parameters
    ----------
    path : path-like
    private : bool
        Also require that the directory belongs to the current user and is not writable by
        group or others (used for directories in a shared temporary location).

    Returns
    -------
    bool
    """
    try:
        p = Path(path)
        p.mkdir(parents=True, exist_ok=True, mode=0o700 if private else 0o777)
        if private and hasattr(os, "getuid"):
            st = p.stat()
            if st.st_uid != os.getuid() or st.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
                return False
        tempfile.TemporaryFile(dir=p).close()
    except (OSError, ValueError):
        return False
    return True


def _user_cache_dir() -> Path | None:
    base = os.environ.get("XDG_CACHE_HOME")
    if not base:
        try:
            base = str(Path.home() / ".cache")
        except (RuntimeError, KeyError, OSError):
            return None
    return Path(base) / "grmc" / "numba"


def _temp_cache_dir() -> Path | None:
    try:
        tmp = tempfile.gettempdir()
    except (OSError, FileNotFoundError):
        return None
    uid = os.getuid() if hasattr(os, "getuid") else "user"
    return Path(tmp) / f"grmc-numba-{uid}"


def select_cache_dir(
    candidates: Iterable[tuple[str, str | os.PathLike | None, bool]],
    writable: Callable[..., bool] = is_writable_dir,
) -> tuple[str, str] | None:
    """The first usable cache directory of ``candidates``.

    Parameters
    ----------
    candidates : iterable of (name, path or None, private)
        In order of preference; ``None`` paths are skipped.
    writable : callable
        ``writable(path, private=...) -> bool`` (replaceable in tests).

    Returns
    -------
    (name, path) or None
        None when no candidate is writable: caching must be switched off.
    """
    for name, path, private in candidates:
        if path is not None and writable(path, private=private):
            return name, str(path)
    return None


def _configure_cache() -> tuple[bool, str | None]:
    """Choose the cache directory and tell numba (see the module notes)."""
    user = os.environ.get("NUMBA_CACHE_DIR") or None
    chosen = select_cache_dir([
        ("NUMBA_CACHE_DIR", user, False),
        ("in-tree", _IN_TREE, False),
        ("user", _user_cache_dir(), False),
        ("temp", _temp_cache_dir(), True),
    ])
    if chosen is None:
        return False, None
    name, path = chosen
    # "in-tree" needs nothing: numba skips an unwritable NUMBA_CACHE_DIR by itself.
    if name in ("user", "temp"):
        os.environ["NUMBA_CACHE_DIR"] = path
        if "numba" in sys.modules:  # imported before us: its config has been read already
            sys.modules["numba"].core.config.CACHE_DIR = path
    return True, path


CACHE_ENABLED, CACHE_DIR = _configure_cache()

# numba is imported only now, after NUMBA_CACHE_DIR is settled (its config reads it).
import numba  # noqa: E402

#: The decorator of every compiled engine function.
jit = numba.njit(nogil=True, cache=CACHE_ENABLED, fastmath=False, error_model="numpy")

#: The decorator of a small step of a compiled loop (same options, no cache of its own: a
#: step is never called from Python, its code is compiled into its caller's).  A step called
#: once in a loop is inlined by LLVM; measured in ``benchmarks/bench_engine.py``, this runs
#: the event loop at the speed of the loop written out in one function, while numba's own
#: IR-level inlining (:data:`inline_step`) of the larger steps cost about a third.
step = numba.njit(nogil=True, fastmath=False, error_model="numpy")

#: A step inlined at numba's IR level (``inline="always"``): for a small step called at more
#: than one place in a loop, which LLVM would leave as a call.
inline_step = numba.njit(inline="always", nogil=True, fastmath=False, error_model="numpy")
