"""Imports the output stage needs, done on a side thread while the trajectories run.

A whole ``grmc run`` process spends about a second of CPU importing what only its last stage
uses (``scipy.stats`` for the intervals, ``xarray`` and ``netCDF4`` for the file, and the
parts of Dask that xarray loads when it is installed).  Done
first, that second is serial and keeps a second core idle; started on a side thread when the
ensemble starts, it runs while the compiled kernels (which release the GIL) keep the cores
busy.  Python's per-module import locks make a later ``import`` of the same module in the
main thread wait for the side thread instead of importing it twice.
"""

from __future__ import annotations

import importlib
import threading

__all__ = ["OUTPUT_MODULES", "prefetch"]

#: Modules imported ahead: the intervals' chi-squared law, the Dataset and its file format,
#: and what xarray itself imports on its first Dataset and first write when Dask is
#: installed (``dask.array`` for its duck-array check, ``distributed`` for the write lock).
OUTPUT_MODULES = ("scipy.stats", "xarray", "netCDF4", "dask.array", "distributed")

_lock = threading.Lock()
_started = False


def _import_all(modules: tuple[str, ...]) -> None:
    for name in modules:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - the stage that needs it reports the failure
            continue


def prefetch(modules: tuple[str, ...] = OUTPUT_MODULES) -> None:
    """Import ``modules`` on a daemon thread (once per process; returns at once)."""
    global _started
    with _lock:
        if _started:
            return
        _started = True
    threading.Thread(target=_import_all, args=(modules,), name="grmc-prefetch",
                     daemon=True).start()
