"""``grmc run``: plan -> ensemble -> merge -> theory -> dataset.

* the plan (:mod:`grmc.plan`) is made once from the scenario: models, start states, time
  slices, seeds;
* the ensemble runs chunks of trajectories on threads, each chunk reduced into its own
  accumulators (:func:`grmc.chunk.reduce_chunk`) and merged in chunk order into the run's
  (:mod:`grmc.accumulators`, :func:`grmc.rounds.run_ensemble`), so the data do not depend
  on the number of workers; with an accuracy target the ensemble runs in rounds until it is
  reached (:mod:`grmc.rounds`, :mod:`grmc.window`);
* the theory (:func:`grmc.theory.theory`) puts the continuum and linear-noise answers beside
  the Monte Carlo ones;
* the Dataset gathers the accumulators' variables, the theory's and the derived ones
  (:mod:`grmc.derived`: fits, shot level, responses, populations, band-averaged spectra).
"""

from __future__ import annotations

import dataclasses
import sys
import time
from typing import TYPE_CHECKING

import numpy as np

from . import spread
from .accumulators import Accumulators
from .dataset import finish
from .derived import derive, flicker_band
from .engine.ensemble import default_workers
from .plan import OVERSAMPLE, Plan, Prepared, SlicePlan, make_plan, prepare, slice_plan, start_state
from .readout import describe_current
from .rounds import RoundBar, run_ensemble, run_rounds
from .scenario import Scenario, check_counts
from .theory import theory
from .window import choose_window, given_run_keys

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = ["run", "assemble", "OVERSAMPLE", "Prepared", "prepare", "start_state",
           "scenario_with"]

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


def run(
    scenario: Scenario,
    *,
    trajectories: int | None = None,
    seed: int | None = None,
    workers: int | None = None,
    progress: bool | None = None,
    command: str | None = None,
    accuracy: float | None = None,
    band_Hz: tuple[float, float] | None = None,
    max_seconds: float | None = None,
    runner=None,
) -> xr.Dataset:
    """Run the ensemble of a scenario and return the output Dataset.

    Parameters
    ----------
    scenario : Scenario
    trajectories : int, optional  Override ``[run] trajectories`` (with an accuracy: the
        first round's size, rounded up to a multiple of 16; default 32)
    seed : int, optional  Override ``[run] seed``
    workers : int, optional  Threads (default: all cores); the data do not depend on it
    progress : bool, optional  Progress bar and the lines saying what was chosen: True,
        False, or None (the bar only on a terminal)
    command : str, optional  Command line recorded in ``history``
    accuracy : float, optional  Override ``[run] accuracy``: run in rounds until every
        checked relative 95 % half-width is at most this (0 < accuracy < 1) [1]
    band_Hz : (float, float), optional  Override ``[run] band_Hz``, the band the spectra
        must reach the accuracy in [Hz]
    max_seconds : float, optional  Override ``[run] max_seconds``, the time budget of a run
        in rounds [s]
    runner : ChunkRunner, optional  Where the chunks are reduced and what is kept of them
        (:func:`grmc.distributed.open_runner`: a Dask cluster, parts for a resume); default
        this process's threads

    Returns
    -------
    xarray.Dataset  The variables of the output contract (see :mod:`grmc.dataset`); with an
    accuracy also the attributes ``accuracy_target``, ``accuracy_reached``,
    ``accuracy_band_Hz``, ``rounds`` and ``accuracy_stop``.

    Raises
    ------
    ScenarioError
        A target band that cannot be resolved (names ``[run] band_Hz``), before simulating.
    KeyboardInterrupt
        When interrupted; nothing is returned or written.
    """
    first = None if trajectories is None else int(trajectories)
    scenario = scenario_with(scenario, trajectories=first,
                             seed=None if seed is None else int(seed),
                             accuracy=accuracy, band_Hz=None if band_Hz is None
                             else tuple(map(float, band_Hz)), max_seconds=max_seconds)
    check_counts(scenario)
    rs = scenario.run
    if rs.accuracy is not None:
        return _run_to_accuracy(scenario, first=first, workers=workers, progress=progress,
                                command=command, runner=runner)
    plan = make_plan(scenario, slice_events=SLICE_EVENTS)
    t0 = time.perf_counter()
    bar = RoundBar(progress, rs.trajectories * plan.slices.units,
               f"trajectories ({plan.slices.units} time slices each)")
    try:
        acc = run_ensemble(plan, range(rs.trajectories), Accumulators.for_plan(plan),
                           workers=workers, bar=bar, runner=runner)
    finally:
        bar.close()
    return assemble(plan, acc, wall_time_s=time.perf_counter() - t0, command=command)


def _run_to_accuracy(scenario: Scenario, *, first: int | None, workers: int | None,
                     progress: bool | None, command: str | None,
                     runner=None) -> xr.Dataset:
    """A run in rounds (:mod:`grmc.rounds`) with the window chosen where it was left out
    (:mod:`grmc.window`)."""
    rs = scenario.run
    if first is None and "trajectories" in given_run_keys(scenario):
        first = rs.trajectories
    choice = choose_window(scenario, accuracy=rs.accuracy, band_Hz=rs.band_Hz,
                           max_seconds=rs.max_seconds, first=first,
                           workers=workers or default_workers())
    if progress is not False:
        for line in choice.notes:
            print(f"grmc: chose {line}", file=sys.stderr)
    plan = make_plan(choice.scenario, slice_events=SLICE_EVENTS)
    out = run_rounds(plan, first=choice.first, accuracy=rs.accuracy, band_Hz=choice.band_Hz,
                     max_seconds=rs.max_seconds, workers=workers, progress=progress,
                     runner=runner)
    reached = out.reached
    if out.stopped_by == "budget":
        print(f"grmc: warning: time budget max_seconds = {rs.max_seconds:g} s reached after "
              f"{out.rounds} rounds ({out.acc.n} trajectories): worst relative half-width "
              f"+-{100 * reached.worst:.3g} % ({reached.where}) against the target "
              f"+-{100 * rs.accuracy:g} %; the file holds what was reached", file=sys.stderr)
    return assemble(plan, out.acc, wall_time_s=out.wall_time_s, command=command,
                    accuracy_target=float(rs.accuracy),
                    accuracy_reached=float(reached.worst),
                    accuracy_worst=reached.where,
                    accuracy_band_Hz=np.array(choice.band_Hz, dtype=float),
                    accuracy_stop=out.stopped_by, rounds=int(out.rounds),
                    accuracy_choices="; ".join(choice.notes))


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
    # the transient starts from the simulated mean, lifted onto the model's species
    data.update(theory(model0, freqs, times=t,
                       start=spread.lift(model0, data["count_mean"][1][:, 0]),
                       current=plan.current, drive=acc.drive is not None,
                       steady=plan.base.steady).variables)
    coords = {
        "t": ("t", t),
        "species": ("species", np.array(list(plan.species), dtype=object)),
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
    band = flicker_band(plan)
    if band is not None:
        attrs["flicker_band_Hz"] = np.array(band)
    return attrs
