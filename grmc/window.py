"""Window, sampling and band chosen for a run with an accuracy target.

When ``[run] accuracy`` is set and ``duration_s``, ``samples`` or ``settle_s`` are left out
of the scenario, they are chosen from the linear-noise relaxation times tau_k and the band:

* band (unless given): from a decade below the slowest corner 1/(2 pi tau_max) to a decade
  above the fastest 1/(2 pi tau_min), widened about its geometric centre to at least three
  decades;
* settle_s: ten slowest relaxation times, so the start state's offset from the stationary
  law has decayed to e^-10 (with a pulse the transient after t = 0 is kept in the window);
* duration_s: long enough that the lowest whole band above f1 holds at least
  :data:`MIN_BAND_FREQUENCIES` Fourier frequencies, and at least 100 tau_max (the
  rectangular window's leakage bias is about tau / T, see :func:`grmc.spectra.periodogram`);
* samples: a power of two putting f2 at or below a fifth of the sampling rate, where the
  spectrum's sampling correction holds to 1 %.

A band that one window cannot hold (more than :data:`MAX_SAMPLES` samples), that a given
window does not resolve, or whose first round the time budget cannot pay for, is refused
before anything is simulated.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass

import numpy as np

from .bands import BANDS_PER_DECADE
from .model import build_model
from .plan import OVERSAMPLE
from .scenario import Scenario, ScenarioError, check_band
from .theory import theory

__all__ = ["Choice", "choose_window", "given_run_keys", "MAX_SAMPLES", "MIN_BAND_FREQUENCIES",
           "ENGINE_EVENTS_PER_S"]

#: Fourier frequencies the lowest band must hold [1].
MIN_BAND_FREQUENCIES = 4
#: Largest number of output samples chosen for one trajectory's window [1].
MAX_SAMPLES = 2**18
#: Sampling rate over the highest band frequency (the spectrum is corrected to 1 % below
#: fs/5, see :func:`grmc.spectra.periodogram`) [1].
OVERSAMPLING = 5.0
#: Events per second per worker assumed when costing a run before it starts; a round's
#: measured rate replaces it afterwards (benchmarks/bench_engine.py measures 2-4e7) [1/s].
ENGINE_EVENTS_PER_S = 2.0e7
#: Time per fine bin and per recorded series spent on a trajectory's spectra (FFT and
#: reductions), for the same estimate (measured: about 2e-8 s on this machine class) [s].
SPECTRUM_S_PER_BIN = 2.0e-8
#: Decades the default band spans at least.
MIN_DECADES = 3.0


@dataclass(frozen=True)
class Choice:
    """What was chosen for a run with an accuracy target.

    Attributes
    ----------
    scenario : Scenario  With the chosen ``[run]`` keys filled in
    band_Hz : (float, float)  Target band [Hz]
    first : int  Trajectories of the first round [1]
    notes : tuple of str  One line per choice, saying why
    """

    scenario: Scenario
    band_Hz: tuple[float, float]
    first: int
    notes: tuple[str, ...]


def given_run_keys(scenario: Scenario) -> set[str]:
    """Keys written in the scenario's ``[run]`` table (all of them when it has no text)."""
    if not scenario.text:
        return {f.name for f in dataclasses.fields(scenario.run)}
    run = tomllib.loads(scenario.text).get("run", {})
    return set(run) if isinstance(run, dict) else set()


def _default_band(tau: np.ndarray) -> tuple[float, float]:
    corners = 1.0 / (2.0 * math.pi * tau)
    lo, hi = corners.min() / 10.0, corners.max() * 10.0
    decades = math.log10(hi / lo)
    if decades < MIN_DECADES:
        widen = 10.0 ** ((MIN_DECADES - decades) / 2.0)
        lo, hi = lo / widen, hi * widen
    return lo, hi


def _lowest_band_width(f1: float) -> float:
    """Width of the lowest whole band of the fixed grid above f1 [Hz]."""
    k = math.ceil(math.log10(f1) * BANDS_PER_DECADE - 1e-9)
    return 10.0 ** (k / BANDS_PER_DECADE) * (10.0 ** (1.0 / BANDS_PER_DECADE) - 1.0)


def _refuse(scenario: Scenario, key: str, message: str):
    raise ScenarioError(scenario.source, "run", key, message)


def check_target(scenario: Scenario) -> None:
    """Refuse an accuracy outside (0, 1), a band without 0 < f1 < f2, or a budget <= 0 given
    through the Python interface (the scenario file and the command line check their own)."""
    rs = scenario.run
    if not 0.0 < rs.accuracy < 1.0:
        _refuse(scenario, "accuracy", f"must be between 0 and 1, got {rs.accuracy!r}")
    if rs.band_Hz is not None:
        check_band(rs.band_Hz, lambda msg: _refuse(scenario, "band_Hz", msg))
    if not rs.max_seconds > 0:
        _refuse(scenario, "max_seconds", f"must be > 0, got {rs.max_seconds!r}")


def choose_window(scenario: Scenario, *, accuracy: float, band_Hz: tuple | None,
                  max_seconds: float, first: int | None, workers: int) -> Choice:
    """Fill in what the accuracy target leaves open and check the band can be resolved.

    Parameters
    ----------
    scenario : Scenario
    accuracy : float  Target relative 95 % half-width [1]
    band_Hz : (float, float) or None  Target band (None: the default band) [Hz]
    max_seconds : float  Time budget [s]
    first : int or None  Trajectories of the first round (None: 32) [1]
    workers : int  Threads the run will use

    Returns
    -------
    Choice

    Raises
    ------
    ScenarioError
        The band cannot be resolved in one window, by the given window, or within the budget
        (names ``band_Hz``).
    """
    check_target(scenario)
    rs, given = scenario.run, given_run_keys(scenario)
    model = build_model(scenario)
    th = theory(model)
    tau = np.asarray(th.variables["relaxation_time_lna"][1], dtype=float)
    tau = tau[np.isfinite(tau) & (tau > 0)]
    if tau.size == 0:
        _refuse(scenario, "accuracy", "the linear noise has no relaxation time to choose a "
                "window from; give duration_s, samples and band_Hz")
    notes = []
    tau_max = float(tau.max())
    defaulted = band_Hz is None
    if defaulted:
        band_Hz = _default_band(tau)
        notes.append(f"band {band_Hz[0]:.3g}-{band_Hz[1]:.3g} Hz: a decade below the slowest "
                     f"corner ({1 / (2 * math.pi * tau.max()):.3g} Hz) to a decade above the "
                     f"fastest ({1 / (2 * math.pi * tau.min()):.3g} Hz), at least "
                     f"{MIN_DECADES:g} decades")
    f1, f2 = map(float, band_Hz)
    width = _lowest_band_width(f1)
    changes = {}
    if "settle_s" not in given:
        changes["settle_s"] = 10.0 * tau_max
        notes.append(f"settle_s {changes['settle_s']:.3g} s: ten slowest relaxation times "
                     f"({tau_max:.3g} s)"
                     + (", then the pulse at t = 0" if scenario.start.excess_pairs else ""))
    if "duration_s" not in given:
        changes["duration_s"] = max(MIN_BAND_FREQUENCIES / width, 100.0 * tau_max)
        notes.append(f"duration_s {changes['duration_s']:.3g} s: {MIN_BAND_FREQUENCIES} "
                     f"Fourier frequencies in the lowest band ({width:.3g} Hz wide) and at "
                     f"least 100 slowest relaxation times")
    duration = changes.get("duration_s", rs.duration_s)
    if "samples" not in given:
        need = OVERSAMPLING * f2 * duration
        samples = max(1024, 2 ** math.ceil(math.log2(need)))
        if samples > MAX_SAMPLES:
            _refuse(scenario, "band_Hz", f"{f1:.3g}-{f2:.3g} Hz spans too many decades for "
                    f"one window: {samples} samples needed, at most {MAX_SAMPLES}; narrow the "
                    "band or give duration_s and samples")
        changes["samples"] = samples
        notes.append(f"samples {samples}: sampling rate {samples / duration:.3g} Hz, at least "
                     f"{OVERSAMPLING:g} times the band's top {f2:.3g} Hz")
    samples = changes.get("samples", rs.samples)
    fs = samples / duration
    lowest = 1.0 / (duration * (10 ** (1 / BANDS_PER_DECADE) - 1))  # one frequency per band
    if defaulted and (f1 < lowest or f2 > fs / OVERSAMPLING):
        f1, f2 = max(f1, lowest), min(f2, fs / OVERSAMPLING)
        if f1 >= f2:
            _refuse(scenario, "duration_s", f"the window (duration_s {duration:.3g} s, samples "
                    f"{samples}) resolves no band of the default band; leave duration_s and "
                    "samples out, or give band_Hz")
        notes.append(f"band {f1:.3g}-{f2:.3g} Hz: the default band within what the given "
                     f"window resolves (one Fourier frequency per band from {lowest:.3g} Hz, "
                     f"a fifth of the sampling rate {fs:.3g} Hz)")
        width = _lowest_band_width(f1)
    if width * duration < 1.0 or f2 > fs / 2.0:
        _refuse(scenario, "band_Hz", f"{f1:.3g}-{f2:.3g} Hz is not resolved by the window "
                f"(duration_s {duration:.3g} s resolves down to about {lowest:.3g} Hz, "
                f"samples {samples} up to {fs / 2:.3g} Hz)")
    if first is None:
        first = 32
    first = max(16, 16 * math.ceil(first / 16))
    notes.append(f"first round {first} trajectories (a multiple of 16); each later round "
                 "doubles the total")
    scen = dataclasses.replace(scenario, run=dataclasses.replace(rs, trajectories=first,
                                                                 **changes))
    _check_budget(scen, model, max_seconds, workers)
    return Choice(scen, (f1, f2), first, tuple(notes))


def _check_budget(scenario: Scenario, model, max_seconds: float, workers: int) -> None:
    """Refuse a band whose first round alone would overrun the budget (engine speed
    assumed at :data:`ENGINE_EVENTS_PER_S` per worker, spectra at
    :data:`SPECTRUM_S_PER_BIN`)."""
    rs = scenario.run
    x = model.nearest_neutral_state(theory(model).steady)
    rate = float(model.propensities(x).sum())
    per_traj = rate * (rs.settle_s + rs.duration_s)
    series = model.n_species + (scenario.readout is not None)
    spectra_s = SPECTRUM_S_PER_BIN * rs.samples * OVERSAMPLE * series
    first_s = (per_traj / ENGINE_EVENTS_PER_S + spectra_s) * rs.trajectories / max(1, workers)
    if first_s > max_seconds:
        _refuse(scenario, "band_Hz", f"the first round ({rs.trajectories} trajectories of "
                f"{per_traj:.3g} events) would take about {first_s:.3g} s, more than the "
                f"budget max_seconds = {max_seconds:g} s; narrow the band or raise the budget")
