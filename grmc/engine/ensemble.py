"""Ensembles: fixed chunks of trajectories spread over threads, reduced in a fixed order.

Reproducibility across worker counts comes from two rules:

1. trajectory ``i`` draws only from streams spawned from ``(seed, i)`` (numpy SeedSequence),
2. trajectories are grouped into chunks whose boundaries depend only on the number of
   trajectories (never on the number of workers), each chunk is reduced on its own, and the
   chunk results are combined in chunk order.

So the floating-point sums, and hence the file data, are identical whatever ``workers`` is.
The compiled kernels release the GIL (``nogil=True``), so threads run them in parallel.
A progress bar (tqdm) advances between chunks, never from inside the event loop, and stays
silent when standard error is not a terminal.  Ctrl-C cancels the chunks not yet started,
waits for the running ones and re-raises, so callers can clean up and write nothing.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ThreadPoolExecutor, wait
from typing import TypeVar

__all__ = ["chunk_bounds", "default_workers", "map_chunks", "Cancelled"]

T = TypeVar("T")


class Cancelled(Exception):
    """Raised inside a chunk when the ensemble was interrupted."""


def default_workers() -> int:
    """All cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def chunk_bounds(n_items: int, *, max_chunks: int = 64, min_size: int = 1) -> list[range]:
    """Split ``range(n_items)`` into contiguous chunks that depend on ``n_items`` only.

    Parameters
    ----------
    n_items : int  Number of trajectories (or time slices)
    max_chunks : int  Upper bound on the number of chunks (progress granularity)
    min_size : int  Smallest chunk

    Returns
    -------
    list of range
    """
    if n_items <= 0:
        return []
    n_chunks = max(1, min(max_chunks, n_items // max(min_size, 1)))
    base, extra = divmod(n_items, n_chunks)
    out, start = [], 0
    for c in range(n_chunks):
        size = base + (1 if c < extra else 0)
        out.append(range(start, start + size))
        start += size
    return out


def map_chunks(
    work: Callable[[range, threading.Event, Callable[[int], None]], T],
    chunks: Sequence[range],
    *,
    workers: int | None = None,
    progress: bool | None = None,
    description: str = "trajectories",
    units_per_item: int = 1,
) -> list[T]:
    """Run ``work(chunk, cancel_event, tick)`` for every chunk; results in chunk order.

    Parameters
    ----------
    work : callable  Reduces one chunk; should check ``cancel_event.is_set()`` between pieces
        of work (raising :class:`Cancelled`) and call ``tick(n)`` after ``n`` units of work
    units_per_item : int  Progress units per item of a chunk (e.g. time slices per
        trajectory); the bar counts units
    chunks : sequence of range
    workers : int, optional  Threads (default: all cores)
    progress : bool, optional  True: always show a bar; False: never; None: only on a terminal
    description : str  Label of the progress bar

    Returns
    -------
    list  One result per chunk, in the order of ``chunks``.

    Raises
    ------
    KeyboardInterrupt
        After cancelling pending chunks and waiting for running ones.
    """
    from tqdm.auto import tqdm

    workers = default_workers() if workers is None else max(1, int(workers))
    total = sum(len(c) for c in chunks) * units_per_item
    if units_per_item > 1:
        description = f"{description} ({units_per_item} time slices each)"
    cancel = threading.Event()
    lock = threading.Lock()
    disable = None if progress is None else (not progress)
    results: dict[int, T] = {}
    bar = tqdm(total=total, desc=description, unit="", disable=disable, leave=False,
               mininterval=0.5, delay=2.0)

    def tick(units: int) -> None:
        with lock:
            bar.update(units)

    try:
        if workers == 1 or len(chunks) == 1:
            for i, chunk in enumerate(chunks):
                results[i] = work(chunk, cancel, tick)
        else:
            with ThreadPoolExecutor(max_workers=workers) as pool:
                futures: dict[Future, int] = {
                    pool.submit(work, chunk, cancel, tick): i for i, chunk in enumerate(chunks)
                }
                pending = set(futures)
                try:
                    while pending:
                        done, pending = wait(pending, timeout=0.2, return_when=FIRST_COMPLETED)
                        for fut in done:
                            results[futures[fut]] = fut.result()
                except BaseException:
                    cancel.set()
                    for fut in pending:
                        fut.cancel()
                    raise
    finally:
        bar.close()
    return [results[i] for i in range(len(chunks))]
