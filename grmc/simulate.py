"""``grmc run``: plan -> ensemble -> merge -> theory -> dataset.

* the plan (:mod:`grmc.plan`) is made once from the scenario: models, start states, time
  slices, seeds;
* the ensemble runs chunks of trajectories on threads, each chunk reduced into its own
  accumulators (:func:`grmc.chunk.reduce_chunk`), merged in chunk order
  (:mod:`grmc.accumulators`), so the data do not depend on the number of workers;
* the theory (:func:`grmc.theory.theory`) puts the continuum and linear-noise answers beside
  the Monte Carlo ones;
* the Dataset gathers the accumulators' variables, the theory's and the derived ones
  (:mod:`grmc.derived`: fits, shot level, responses, populations).
"""

from __future__ import annotations

import dataclasses
import time
from typing import TYPE_CHECKING

import numpy as np

from .accumulators import Accumulators
from .chunk import reduce_chunk
from .dataset import finish
from .derived import derive
from .engine.ensemble import chunk_bounds, map_chunks
from .plan import OVERSAMPLE, Plan, Prepared, SlicePlan, make_plan, prepare, slice_plan, start_state
from .readout import describe_current
from .scenario import Scenario
from .theory import theory

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = ["run", "run_ensemble", "assemble", "OVERSAMPLE", "Prepared", "prepare",
           "start_state", "scenario_with"]

#: Events per engine call when a trajectory is cut into time slices (about a second).
SLICE_EVENTS = 2.0e7


def _slice_plan(base: Prepared, rs) -> SlicePlan:
    """The time slices of one trajectory at the current :data:`SLICE_EVENTS`."""
    return slice_plan(base, rs, SLICE_EVENTS)


def scenario_with(scenario: Scenario, **run_changes) -> Scenario:
    """The scenario with ``[run]`` keys replaced (None values are left as they are)."""
    changes = {k: v for k, v in run_changes.items() if v is not None}
    if not changes:
        return scenario
    return dataclasses.replace(scenario, run=dataclasses.replace(scenario.run, **changes))


def run_ensemble(plan: Plan, indices: range, *, workers: int | None = None,
                 progress: bool | None = None) -> Accumulators:
    """Trajectories ``indices`` of ``plan`` over threads, merged in chunk order."""
    def work(chunk, cancel, tick):
        return reduce_chunk(plan, chunk, cancel=cancel, tick=tick)

    chunks = [range(indices.start + c.start, indices.start + c.stop)
              for c in chunk_bounds(len(indices))]
    parts = map_chunks(work, chunks, workers=workers, progress=progress,
                       units_per_item=plan.slices.units)
    acc = Accumulators.for_plan(plan)
    for part in parts:
        acc.merge(part)
    return acc


def run(
    scenario: Scenario,
    *,
    trajectories: int | None = None,
    seed: int | None = None,
    workers: int | None = None,
    progress: bool | None = None,
    command: str | None = None,
) -> xr.Dataset:
    """Run the ensemble of a scenario and return the output Dataset.

    Parameters
    ----------
    scenario : Scenario
    trajectories : int, optional  Override ``[run] trajectories``
    seed : int, optional  Override ``[run] seed``
    workers : int, optional  Threads (default: all cores); the data do not depend on it
    progress : bool, optional  Progress bar: True, False, or None (only on a terminal)
    command : str, optional  Command line recorded in ``history``

    Returns
    -------
    xarray.Dataset  The variables of the output contract (see :mod:`grmc.dataset`).

    Raises
    ------
    KeyboardInterrupt
        When interrupted; nothing is returned or written.
    """
    scenario = scenario_with(scenario, trajectories=None if trajectories is None
                             else int(trajectories), seed=None if seed is None else int(seed))
    plan = make_plan(scenario, slice_events=SLICE_EVENTS)
    t0 = time.perf_counter()
    acc = run_ensemble(plan, range(scenario.run.trajectories), workers=workers,
                       progress=progress)
    return assemble(plan, acc, wall_time_s=time.perf_counter() - t0, command=command)


def assemble(plan: Plan, acc: Accumulators, *, wall_time_s: float, command: str | None = None,
             **attrs) -> xr.Dataset:
    """The output Dataset of merged accumulators: simulated, theory and derived variables.

    Parameters
    ----------
    plan : Plan
    acc : Accumulators  Merged over every trajectory
    wall_time_s : float  Time spent simulating [s]
    command : str, optional  Command line recorded in ``history``
    **attrs : further global attributes

    Returns
    -------
    xarray.Dataset
    """
    import xarray as xr

    scenario, rs, model0 = plan.scenario, plan.run, plan.base.model
    n = acc.n
    data: dict = {}
    data.update(acc.moments.variables(plan))
    data.update(acc.stationary.variables(plan))
    data.update(acc.count_spectrum.variables(plan))
    data.update(acc.events.variables(plan))
    if acc.current_spectrum is not None:
        data.update(acc.current_spectrum.variables(plan))
    t = np.arange(rs.samples) * (rs.duration_s / rs.samples)
    freqs = plan.frequencies
    data.update(theory(model0, freqs, times=t, start=data["count_mean"][1][:, 0],
                       current=plan.current, drive=acc.drive is not None,
                       steady=plan.base.steady).variables)
    coords = {
        "t": ("t", t),
        "species": ("species", np.array(list(model0.species), dtype=object)),
        "frequency": ("frequency", freqs),
        "channel": ("channel", np.array(plan.names, dtype=object)),
        "realization": ("realization", np.arange(n, dtype=np.int64)),
    }
    hist, hist_coords = acc.histogram.variables(plan)
    data.update(hist)
    coords.update(hist_coords)
    derive(plan, acc, data, coords)
    ds = xr.Dataset(data, coords=coords)
    return finish(ds, title=scenario.title, scenario_toml=scenario.text, command=command,
                  **_attributes(plan, acc, wall_time_s), **attrs)


def _attributes(plan: Plan, acc: Accumulators, wall_time_s: float) -> dict:
    """Global attributes of a run file."""
    scenario, rs, model0 = plan.scenario, plan.run, plan.base.model
    counts0 = model0.counts
    readout = scenario.readout
    attrs = {
        "seed": int(plan.seed),
        "trajectories": int(acc.n),
        "volume_cm3": float(scenario.volume.volume_cm3),
        "duration_s": float(rs.duration_s),
        "settle_s": float(rs.settle_s),
        "excess_pairs": int(scenario.start.excess_pairs),
        "samples": int(rs.samples),
        "dopants": rs.dopants,
        "psd_segments_per_trajectory": int(plan.segments),
        "psd_segments": int(acc.count_spectrum.segments(plan)),
        "psd_oversample": int(OVERSAMPLE),
        "events_total": int(acc.events.n_events),
        "wall_time_s": float(wall_time_s),
        "donors_nominal": int(counts0.donors),
        "acceptors_nominal": int(counts0.acceptors),
        "conserved_charge": int(model0.charge),
        "population_threshold": (float(scenario.population.threshold)
                                 if scenario.population and scenario.population.threshold
                                 else None),
    }
    if readout is not None:
        attrs.update({
            "readout_bias_V": readout.bias_V,
            "readout_length_cm": readout.length_cm,
            "readout_electron_mobility_cm2_Vs": readout.electron_mobility_cm2_Vs,
            "readout_hole_mobility_cm2_Vs": readout.hole_mobility_cm2_Vs,
            "readout_current": describe_current(model0),
        })
    for tr, total in zip(scenario.traps, counts0.traps):
        attrs[f"trap_count_{tr.label}"] = int(total)
    return attrs
