"""The ensemble step: a chunk of trajectories of a plan, reduced into accumulators.

:func:`reduce_chunk` is a pure, top-level function of ``(plan, indices)``: trajectory ``i``
draws only from the streams spawned from ``(seed, i)``, so a chunk gives the same
accumulators wherever and whenever it runs (a thread here, a process elsewhere), and chunks
merged in index order give the same sums as one pass.  Long trajectories are cut into time
slices of about ``SLICE_EVENTS`` events (:func:`grmc.plan.slice_plan`), so Ctrl-C and the
progress bar respond within a second.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Iterable

import numpy as np

from . import spread
from .accumulators import Accumulators, observe
from .engine.ensemble import Cancelled
from .plan import OVERSAMPLE, PURPOSE_ENGINE, Plan, Prepared

__all__ = ["reduce_chunk", "simulate_one"]


def _modulation_at(prep: Prepared, t_start: float) -> dict:
    """The engine's ``modulation`` argument for a call whose clock starts at window time
    ``t_start`` (the drive's phase carried over, so slices join into one waveform)."""
    mod = prep.model.modulation
    if mod is None:
        return {}
    channel, kind, freq, depth, phase = mod
    return {"modulation": (channel, kind, freq, depth,
                           math.fmod(phase + 2.0 * math.pi * freq * t_start, 2.0 * math.pi))}


def _flows_of(prep: Prepared) -> dict:
    """The engine's ``flow_weight`` argument where the model has collection channels."""
    w = prep.model.flow_weight
    return {"flow_weight": w} if np.any(w) else {}


class _Joined:
    """A trajectory assembled from time slices (the fields the reductions read)."""

    def __init__(self, parts):
        self.samples = np.concatenate([p.samples for p in parts])
        self.bins = np.concatenate([p.bins for p in parts])
        self.integ = np.sum([p.integ for p in parts], axis=0)
        self.integ2 = np.sum([p.integ2 for p in parts], axis=0)
        self.events = np.sum([p.events for p in parts], axis=0)
        self.final = parts[-1].final
        self.flows = np.concatenate([p.flows for p in parts])


def _never(_units: int) -> None:
    return None


def simulate_one(plan: Plan, i: int, prep: Prepared, *, cancel: threading.Event | None = None,
                 tick: Callable[[int], None] = _never):
    """Trajectory ``i`` of ``plan`` as consecutive engine calls (settling, then the window).

    Returns the engine's result (or the slices joined), with the fields ``samples``,
    ``bins``, ``integ``, ``integ2``, ``events``, ``final`` and ``flows``.
    """
    from .engine.kernels import simulate as simulate_trajectory
    from .engine.rng import stream_state

    rs, sp = plan.run, plan.slices
    rng_state = stream_state(plan.seed, i, purpose=PURPOSE_ENGINE)
    x = prep.x0
    zero = np.zeros_like(plan.excess)
    # a short settling runs inside the first window call (the kernel's own settle phase);
    # a long one in slices of its own, whose records are discarded
    settle_first = rs.settle_s if sp.settle_slices == 1 else 0.0
    for k in range(sp.settle_slices if sp.settle_slices > 1 else 0):
        if cancel is not None and cancel.is_set():
            raise Cancelled
        x = simulate_trajectory(*prep.arrays, x0=x, rng_state=rng_state, settle_s=0.0,
                                excess=zero, duration_s=rs.settle_s / sp.settle_slices,
                                n_samples=1, oversample=1, **_flows_of(prep),
                                **_modulation_at(prep, -rs.settle_s + k * rs.settle_s
                                                 / sp.settle_slices)).final
        tick(1)
    parts = []
    n = rs.samples // sp.window_slices
    for k in range(sp.window_slices):
        if cancel is not None and cancel.is_set():
            raise Cancelled
        res = simulate_trajectory(*prep.arrays, x0=x, rng_state=rng_state,
                                  settle_s=settle_first if k == 0 else 0.0,
                                  excess=plan.excess if k == 0 else zero,
                                  duration_s=rs.duration_s / sp.window_slices, n_samples=n,
                                  oversample=OVERSAMPLE, **_flows_of(prep),
                                  **_modulation_at(prep, k * rs.duration_s / sp.window_slices))
        x = res.final
        parts.append(res)
        tick(1 + (k == 0 and sp.settle_slices == 1))
    return parts[0] if len(parts) == 1 else _Joined(parts)


def reduce_chunk(plan: Plan, indices: Iterable[int], *, cancel: threading.Event | None = None,
                 tick: Callable[[int], None] = _never) -> Accumulators:
    """Simulate trajectories ``indices`` (in order) and fold them into fresh accumulators.

    Parameters
    ----------
    plan : Plan  The run's plan
    indices : iterable of int  Trajectory indices, ascending
    cancel : threading.Event, optional  Checked between engine calls (raises
        :class:`grmc.engine.ensemble.Cancelled`)
    tick : callable, optional  Called with the number of engine calls done

    Returns
    -------
    Accumulators  Picklable; merge chunk results in index order.

    Notes
    -----
    Each trajectory is projected onto the output species right after it is simulated
    (:func:`grmc.spread.project_trajectory`: a spread trap level's total beside its
    sub-levels; the identity without a spread), so every accumulator sees the file's species.
    """
    acc = Accumulators.for_plan(plan)
    for i in indices:
        prep = plan.device(i)
        res = spread.project_trajectory(simulate_one(plan, i, prep, cancel=cancel, tick=tick),
                                        prep.model, plan.run.duration_s)
        acc.add(observe(plan, i, res, prep), plan)
    return acc
