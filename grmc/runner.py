"""Chunk runners: where the chunks of an ensemble are reduced, and what is kept of them.

A :class:`ChunkRunner` takes the chunks of trajectories of one step of a run (the whole
ensemble, or one round of a run to an accuracy target), reduces each with
:func:`grmc.chunk.reduce_chunk` on a backend, and folds the results into the run's
accumulators in chunk order, whatever order they finish in.  So the data are those of one
pass on one thread, whichever backend ran the chunks and however many workers it had.

Backends
--------
* :class:`Threads`: this process's cores (the kernels release the GIL);
* :class:`grmc.distributed.Cluster`: the workers of a running Dask scheduler.

With an output file the runner also keeps every finished chunk in ``<OUT>.parts/``
(:mod:`grmc.parts`) as it arrives, and on ``resume`` takes the chunks found there instead of
computing them again.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait

from .accumulators import Accumulators
from .chunk import reduce_chunk
from .engine.ensemble import default_workers
from .parts import Parts
from .plan import Plan
from .prefetch import prefetch

__all__ = ["ChunkRunner", "Threads"]


def _never(_units: int) -> None:
    return None


class Threads:
    """Chunks reduced on threads of this process (the default of ``grmc run``).

    Parameters
    ----------
    workers : int, optional  Threads (default: all cores); the data do not depend on it
    """

    def __init__(self, workers: int | None = None):
        self.workers = workers

    def reduce(self, plan: Plan, items: Sequence[tuple[int, range]],
               tick: Callable[[int], None]) -> Iterator[tuple[int, Accumulators]]:
        """Yield ``(position, accumulators)`` of every chunk as it finishes.

        At most two chunks per thread are in flight; on an interruption (or when the
        consumer stops) the running chunks are cancelled at their next time slice.
        """
        workers = default_workers() if self.workers is None else max(1, int(self.workers))
        cancel = threading.Event()
        if workers == 1 or len(items) == 1:
            for k, chunk in items:
                yield k, reduce_chunk(plan, chunk, cancel=cancel, tick=tick)
            return
        todo = iter(items)
        with ThreadPoolExecutor(max_workers=workers) as pool:
            pending: dict = {}

            def top_up() -> None:
                for k, chunk in todo:
                    pending[pool.submit(reduce_chunk, plan, chunk, cancel=cancel,
                                        tick=tick)] = k
                    if len(pending) >= 2 * workers:
                        break

            try:
                top_up()
                while pending:
                    done, _ = wait(pending, timeout=0.2, return_when=FIRST_COMPLETED)
                    for fut in sorted(done, key=pending.get):
                        yield pending.pop(fut), fut.result()
                    top_up()
            except BaseException:
                cancel.set()
                for fut in pending:
                    fut.cancel()
                raise

    def close(self) -> None:
        """Nothing to release."""


class ChunkRunner:
    """Reduce chunks on a backend, keep them as parts, fold them in chunk order.

    Parameters
    ----------
    backend : Threads or grmc.distributed.Cluster, optional  Where chunks are reduced
        (default: :class:`Threads` with the run's ``workers``)
    out : path, optional  Output file; with it finished chunks are kept in ``<OUT>.parts/``
    resume : bool  Take the chunks an interrupted run of the same plan kept
    hook : callable, optional  Called as ``hook(runner)`` after every chunk that finished
        here (not those taken from parts), from the calling thread

    Attributes
    ----------
    computed : int  Chunks reduced by the backend [1]
    loaded : int  Chunks taken from parts [1]
    parts : Parts or None  Opened at the first :meth:`fold` (it needs the plan)
    """

    def __init__(self, backend=None, *, out: str | os.PathLike[str] | None = None,
                 resume: bool = False, hook: Callable[[ChunkRunner], None] | None = None):
        self.backend = backend
        self.out = out
        self.resume = resume
        self.hook = hook
        self.parts: Parts | None = None
        self.computed = 0
        self.loaded = 0

    def _parts_for(self, plan: Plan) -> Parts | None:
        if self.out is not None and self.parts is None:
            self.parts = Parts(self.out, plan, resume=self.resume)
        return self.parts

    def fold(self, plan: Plan, chunks: Sequence[range], acc: Accumulators, *,
             workers: int | None = None, bar=None) -> Accumulators:
        """Fold ``chunks`` of ``plan`` into ``acc`` in order (changed in place, returned).

        Parameters
        ----------
        plan : Plan
        chunks : sequence of range  Consecutive chunks of trajectories
        acc : Accumulators  The running accumulators
        workers : int, optional  Threads of the default backend
        bar : optional  Progress bar with ``update(units)``, one unit per engine call

        Raises
        ------
        PartsRefused
            Parts of another run are in the way (checked before anything is simulated).
        KeyboardInterrupt
            When interrupted; the chunks finished so far stay in the parts folder.
        """
        prefetch()  # the output stage's imports, while the chunks run
        backend = self.backend if self.backend is not None else Threads(workers)
        tick = bar.update if bar is not None else _never
        units = plan.slices.units
        parts = self._parts_for(plan)
        ready: dict[int, Accumulators] = {}
        todo = []
        for k, chunk in enumerate(chunks):
            hit = parts.get(chunk) if parts is not None else None
            if hit is None:
                todo.append((k, chunk))
            else:
                ready[k] = hit
                self.loaded += 1
                tick(len(chunk) * units)
        merged = 0

        def merge_ready() -> None:
            nonlocal merged
            while merged in ready:
                acc.merge(ready.pop(merged))
                merged += 1

        merge_ready()
        stream = backend.reduce(plan, todo, tick)
        try:
            for k, part in stream:
                if parts is not None:
                    parts.put(chunks[k], part)
                self.computed += 1
                ready[k] = part
                merge_ready()
                if self.hook is not None:
                    self.hook(self)
        finally:
            stream.close()
        if merged != len(chunks):  # pragma: no cover - a backend that lost a chunk
            raise RuntimeError(f"chunks {merged} .. {len(chunks) - 1} did not come back")
        return acc

    def finish(self) -> None:
        """The output file is written: remove the parts folder."""
        if self.parts is not None:
            self.parts.remove()

    def close(self) -> None:
        """Release the backend (the parts stay)."""
        if self.backend is not None:
            self.backend.close()
