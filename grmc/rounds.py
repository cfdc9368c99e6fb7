"""The ensemble in rounds: simulate, merge, check the accuracy, double, until good enough.

Every round folds its chunks of trajectories (:func:`grmc.plan.trajectory_chunks`) into the
one running set of accumulators, in index order, exactly as a single pass over all the
trajectories would; trajectory i always draws from the streams of (seed, i).  So a run that
stops after trajectories 0 .. N-1 holds the same data as a fixed run of N trajectories with
the same seed.

The first round has ``first`` trajectories (a multiple of 16, so the jackknife groups i mod
16 and the single segment per trajectory stay the same in every round); each later round
doubles the total.  The run stops when the worst relative 95 % half-width of what is checked
(:func:`grmc.accuracy.worst_half_width`) is at most the target, or before a round that the
time budget would not allow (the time per trajectory measured so far predicts it).
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass

from .accumulators import Accumulators
from .accuracy import Reached, worst_half_width
from .chunk import reduce_chunk
from .engine.ensemble import map_chunks
from .plan import Plan, trajectory_chunks

__all__ = ["BATCH_CHUNKS", "Outcome", "RoundBar", "run_ensemble", "run_rounds"]

#: Chunks handed to the threads at once; their results are merged before the next batch,
#: which bounds the memory held by chunk results.
BATCH_CHUNKS = 64


class RoundBar:
    """One progress bar over a run (tqdm; silent unless asked or on a terminal)."""

    def __init__(self, progress: bool | None, total: int, description: str):
        from tqdm.auto import tqdm

        self.lock = threading.Lock()
        self.bar = tqdm(total=total, desc=description, unit="", leave=False, mininterval=0.5,
                        delay=2.0, disable=None if progress is None else (not progress))

    def update(self, units: int) -> None:
        with self.lock:
            self.bar.update(units)

    def restart(self, total: int, description: str) -> None:
        with self.lock:
            self.bar.reset(total=total)
            self.bar.set_description_str(description, refresh=False)

    def close(self) -> None:
        self.bar.close()


def run_ensemble(plan: Plan, indices: range, acc: Accumulators, *, workers: int | None = None,
                 bar: RoundBar | None = None, runner=None) -> Accumulators:
    """Fold trajectories ``indices`` of ``plan`` into ``acc`` (threads; chunk order kept).

    Parameters
    ----------
    plan : Plan
    indices : range  Trajectories to add (bounds multiples of the chunk size, or the end)
    acc : Accumulators  The running accumulators, changed in place and returned
    workers : int, optional  Threads (default: all cores); the data do not depend on it
    bar : optional  Progress bar, advanced by one unit per engine call
    runner : ChunkRunner, optional  Reduces the chunks instead (:mod:`grmc.runner`: a
        cluster's workers, parts kept for a resume)
    """
    if runner is not None:
        return runner.fold(plan, trajectory_chunks(indices.start, indices.stop), acc,
                           workers=workers, bar=bar)
    tick = bar.update if bar is not None else (lambda units: None)

    def work(chunk, cancel, _tick):
        return reduce_chunk(plan, chunk, cancel=cancel, tick=tick)

    chunks = trajectory_chunks(indices.start, indices.stop)
    for b in range(0, len(chunks), BATCH_CHUNKS):
        for part in map_chunks(work, chunks[b:b + BATCH_CHUNKS], workers=workers,
                               progress=False):
            acc.merge(part)
    return acc


@dataclass
class Outcome:
    """How a run in rounds ended.

    Attributes
    ----------
    acc : Accumulators  Merged over every trajectory simulated
    rounds : int  Rounds run
    reached : Reached  The worst relative half-width and where it is
    stopped_by : "accuracy" or "budget"
    wall_time_s : float  Time spent simulating [s]
    """

    acc: Accumulators
    rounds: int
    reached: Reached
    stopped_by: str
    wall_time_s: float


def _label(rounds: int, total: int, size: int, worst: float | None, target: float) -> str:
    now = "not yet known" if worst is None else f"+-{100 * worst:.1f} %"
    return (f"round {rounds + 1}: {total}+{size} trajectories, worst {now} "
            f"(target +-{100 * target:g} %)")


def run_rounds(plan: Plan, *, first: int, accuracy: float, band_Hz: tuple[float, float],
               max_seconds: float, workers: int | None = None,
               progress: bool | None = None, runner=None) -> Outcome:
    """Run rounds of trajectories until the accuracy is reached or the budget would be
    exceeded.

    Parameters
    ----------
    plan : Plan  Planned with ``first`` trajectories
    first : int  Trajectories of the first round [1]
    accuracy : float  Target relative 95 % half-width [1]
    band_Hz : (float, float)  Band whose band-averaged spectra are checked [Hz]
    max_seconds : float  Time budget [s]
    workers : int, optional  Threads
    progress : bool, optional  Progress bar
    runner : ChunkRunner, optional  Reduces each round's chunks (see :func:`run_ensemble`)

    Returns
    -------
    Outcome
    """
    acc = Accumulators.for_plan(plan)
    total, size, rounds, reached = 0, int(first), 0, None
    units = plan.slices.units
    bar = RoundBar(progress, size * units, _label(0, 0, size, None, accuracy))
    t0 = time.perf_counter()
    try:
        while True:
            plan.check_pixels(total, total + size)
            run_ensemble(plan, range(total, total + size), acc, workers=workers, bar=bar,
                         runner=runner)
            total, rounds = total + size, rounds + 1
            reached = worst_half_width(plan, acc, band_Hz)
            if reached.worst <= accuracy:
                stopped = "accuracy"
                break
            elapsed = time.perf_counter() - t0
            size = total  # the next round doubles the total
            if elapsed + elapsed / total * size > max_seconds:
                stopped = "budget"
                break
            bar.restart(size * units, _label(rounds, total, size, reached.worst, accuracy))
    finally:
        bar.close()
    return Outcome(acc, rounds, reached, stopped, time.perf_counter() - t0)
