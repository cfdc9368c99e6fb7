"""The answer at any volume: choose the method, say why, and produce the file.

:func:`choose_method` picks, in this order (the reason is one sentence with its numbers):

1. ``"exact"``: the master equation, when its truncated state space fits
   (:func:`grmc.exact.estimate_states` against ``max_states``);
2. ``"linear-noise"``: the linear-noise answer, when the predicted next-order error of every
   species' mean and variance (:mod:`grmc.next_order`) is below ``accuracy / 5`` and no count
   that the answer depends on is small (:func:`small_counts`);
3. ``"monte-carlo"``: the adaptive Monte Carlo run (:func:`grmc.simulate.run` with an
   accuracy target).

:func:`solve_exact` and :func:`solve_linear_noise` write the variables of ``grmc exact``
files (so ``plot`` and ``export`` read them unchanged) and the attributes ``method``,
``method_reason`` and ``accuracy_target``; :func:`solve_monte_carlo` adds the same to the
adaptive run's file.  The rule for small counts and the margin of five are explained in
``docs/solve.md``.
"""

from __future__ import annotations

import math
from typing import Literal, NamedTuple

import numpy as np

from . import continuum, exact
from .model import MAX_FACTORS, Model, build_model
from .next_order import NextOrder, next_order
from .scenario import Scenario, ScenarioError
from .solve_bands import add_band_spectra

__all__ = [
    "DEFAULT_MAX_STATES",
    "FEW_COUNTS",
    "Method",
    "SmallCount",
    "choose_method",
    "small_counts",
    "solve",
    "solve_exact",
    "solve_linear_noise",
    "solve_monte_carlo",
    "solve_with",
]

Method = Literal["exact", "linear-noise", "monte-carlo"]

#: Largest state space the chooser hands to the master equation (the sweep's limit) [states].
DEFAULT_MAX_STATES = 200_000
#: A count below this, entering a law together with another count that fluctuates, is small
#: (common practice: the continuum answer is not trusted below about ten carriers).
FEW_COUNTS = 10.0
#: The predicted next-order error must be below accuracy / MARGIN.
MARGIN = 5.0


class SmallCount(NamedTuple):
    """A count the answer depends on, at its continuum steady state.

    Attributes
    ----------
    what : str  The count, e.g. ``electrons`` or ``empty traps of level a``
    value : float  Its continuum mean [count]
    channel : str  The channel whose law multiplies it with a fluctuating count
    """

    what: str
    value: float
    channel: str


def small_counts(model: Model, x: np.ndarray, empty: np.ndarray, cov: np.ndarray,
                 tolerance: float) -> list[SmallCount]:
    """The small counts the answer depends on, smallest first.

    A count is one the answer depends on when it is a factor of a law that multiplies it with
    another count whose relative fluctuation ``sd/mean`` exceeds ``tolerance`` (the product's
    mean then departs from the product of the means, at every order of the expansion), in a
    channel carrying at least ``tolerance`` of the largest event rate among the channels
    that change the same species.  It is small below :data:`FEW_COUNTS`.

    Parameters
    ----------
    model : Model
    x : ndarray (S,)  Continuum steady state [count]
    empty : ndarray (S,)  Empty traps of each level as the continuum solver carries them [count]
    cov : ndarray (S, S)  Linear-noise covariance [count^2]
    tolerance : float  ``accuracy / 5`` [1]

    Returns
    -------
    list of SmallCount
    """
    fs = np.asarray(model.factor_species)
    sign = np.asarray(model.factor_sign)
    cap = np.asarray(model.capacity, dtype=np.float64)
    rates = np.abs(model.rates(x))
    nu = np.asarray(model.stoich) != 0
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    out: dict[str, SmallCount] = {}
    for r, ch in enumerate(model.channels):
        variable = [f for f in range(MAX_FACTORS) if fs[r, f] >= 0]
        if len(variable) < 2:
            continue
        share = nu[:, nu[r]].any(axis=1) if nu[r].any() else np.zeros(model.n_channels, bool)
        top = rates[share].max() if share.any() else rates[r]
        if top <= 0 or rates[r] < tolerance * top:
            continue
        vals = {}
        for f in variable:
            s = int(fs[r, f])
            comp = sign[r, f] < 0 and cap[s] > 0
            vals[f] = (float(empty[s]) if comp else float(x[s]), s, comp)
        for f in variable:
            value, s, comp = vals[f]
            others = [g for g in variable if vals[g][1] != s]
            if not others or value >= FEW_COUNTS:
                continue
            cv = max(sd[vals[g][1]] / vals[g][0] if vals[g][0] > 0 else math.inf
                     for g in others)
            if cv <= tolerance:
                continue
            name = model.species[s]
            what = f"empty traps of level {name.split(':', 1)[1]}" if comp else name
            if what not in out or value < out[what].value:
                out[what] = SmallCount(what, value, ch.name)
    return sorted(out.values(), key=lambda c: c.value)


def _worst(values: np.ndarray, names: tuple[str, ...], moving: np.ndarray) -> tuple[float, str]:
    vals = np.where(moving, values, 0.0)
    k = int(np.argmax(vals))
    return float(vals[k]), names[k]


def choose_method(scenario: Scenario, accuracy: float, *,
                  max_states: int = DEFAULT_MAX_STATES) -> tuple[Method, str]:
    """Pick the method that answers a scenario to a relative accuracy, and say why.

    Parameters
    ----------
    scenario : Scenario
    accuracy : float
        Relative accuracy wanted of the means, variances and spectra, 0 < accuracy < 1 [1].
    max_states : int
        Largest state space handed to the master equation [states].

    Returns
    -------
    method : {"exact", "linear-noise", "monte-carlo"}
    reason : str  One sentence with the numbers the choice rests on.

    Notes
    -----
    See the module notes and ``docs/solve.md``.  The next-order error is that of
    :mod:`grmc.next_order` (Grima, J. Chem. Phys. 133, 035101, 2010): ``|delta| / x*`` for
    each mean and the variance proxy relative to the linear-noise variance.
    """
    if not 0.0 < float(accuracy) < 1.0:
        raise ValueError(f"accuracy must be between 0 and 1, got {accuracy}")
    model = build_model(scenario)
    states = exact.estimate_states(model)
    if states <= max_states:
        return "exact", (f"the master equation fits: about {states:,} states against the "
                         f"limit of {max_states:,}")
    fits = f"about {states:,} states exceed the master equation's limit of {max_states:,}"
    target = float(accuracy) / MARGIN
    try:
        no = next_order(model)
        x, empty = continuum.steady_state(model, with_empty=True)
        cov = np.asarray(continuum.lna(model).covariance)
    except continuum.ContinuumError as exc:
        return "monte-carlo", f"{fits}, and there is no linear-noise answer ({exc})"
    return _judge(model, no, x, empty, cov, target, fits)


def _judge(model: Model, no: NextOrder, x, empty, cov, target: float,
           fits: str) -> tuple[Method, str]:
    moving = np.any(np.asarray(model.stoich) != 0, axis=0)
    names = tuple(model.species)
    e_mean, s_mean = _worst(no.relative_mean, names, moving)
    e_var, s_var = _worst(no.relative_var, names, moving)
    small = small_counts(model, x, empty, cov, target)
    errors = (f"the predicted next-order error is {e_mean:.3g} of the mean of {s_mean} and "
              f"{e_var:.3g} of the variance of {s_var} (largest), against accuracy/5 = "
              f"{target:.3g}")
    if small:
        c = small[0]
        counts = (f"the smallest count the answer depends on is {c.what} at {c.value:.3g} "
                  f"(below {FEW_COUNTS:g}, in '{c.channel}')")
    else:
        smallest = _smallest_count(model, x, empty)
        counts = (f"no count the answer depends on is below {FEW_COUNTS:g} (the smallest "
                  f"count, {smallest[0]} at {smallest[1]:.3g}, meets no fluctuating partner "
                  "in a law)")
    if max(e_mean, e_var) < target and not small:
        return "linear-noise", f"{fits}; {errors}; {counts}"
    return "monte-carlo", f"{fits}; {errors}; {counts}"


def _smallest_count(model: Model, x, empty) -> tuple[str, float]:
    cand = [(model.species[s], float(x[s])) for s in range(model.n_species)
            if np.any(np.asarray(model.stoich)[:, s] != 0)]
    cand += [(f"empty traps of level {model.species[s].split(':', 1)[1]}", float(empty[s]))
             for s in range(2, model.n_species) if model.capacity[s] > 0]
    return min(cand, key=lambda c: c[1]) if cand else ("-", math.nan)


def _method_attrs(ds, method: Method, reason: str, accuracy: float | None):
    ds.attrs["method"] = method
    ds.attrs["method_reason"] = reason
    if accuracy is not None:
        ds.attrs["accuracy_target"] = float(accuracy)
    return ds


def solve_exact(scenario: Scenario, *, accuracy: float | None = None, reason: str = "",
                max_states: int = DEFAULT_MAX_STATES, command: str | None = None,
                transient: bool = True, freqs: np.ndarray | None = None):
    """The master-equation answer as a Dataset (the ``grmc exact`` file plus the method).

    ``transient`` and ``freqs`` [Hz] as in :func:`grmc.exact_output.exact_dataset`; the
    band-averaged spectra (:mod:`grmc.solve_bands`) are added.

    Raises
    ------
    grmc.exact.ExactRefusal
        When the truncation needs more than ``max_states`` states or the chain is beyond
        double precision.
    """
    from .exact_output import exact_dataset

    ds = add_band_spectra(exact_dataset(scenario, command=command, max_states=max_states,
                                        transient=transient, freqs=freqs))
    return _method_attrs(ds, "exact", reason or "the master equation, solved exactly",
                         accuracy)


def solve_linear_noise(scenario: Scenario, *, accuracy: float | None = None, reason: str = "",
                       command: str | None = None, transient: bool = True):
    """The linear-noise answer as a Dataset with the variables of ``grmc exact`` files.

    ``stationary_mean`` is the continuum mean plus its next-order correction
    (``mean_next_order``), the best prediction of the exact mean at this order;
    ``stationary_var`` and ``psd`` are the linear-noise variance and spectrum;
    ``count_mean`` is the continuum transient from the run's start state and ``count_var``
    the linear-noise covariance grown from zero about the steady state,
    ``S(t) = S - exp(A t) S exp(A^T t)`` (van Kampen 2007, ch. X).
    """
    from .linear_noise_output import linear_noise_dataset

    ds = add_band_spectra(linear_noise_dataset(scenario, command=command,
                                               transient=transient))
    return _method_attrs(ds, "linear-noise", reason or "the linear-noise approximation",
                         accuracy)


def solve_monte_carlo(scenario: Scenario, accuracy: float, *, reason: str = "",
                      band_Hz=None, max_seconds: float | None = None, seed: int | None = None,
                      workers=None, progress: bool | None = True, command: str | None = None,
                      runner=None):
    """The adaptive Monte Carlo run to ``accuracy``, with the method and its reason
    (``runner``: where the chunks run, :mod:`grmc.runner`; default local threads)."""
    from .simulate import run

    ds = run(scenario, accuracy=accuracy, band_Hz=band_Hz, max_seconds=max_seconds,
             seed=seed, workers=workers, progress=progress, command=command, runner=runner)
    if "mean_next_order" not in ds:
        from .dataset import VARIABLES

        try:
            ds["mean_next_order"] = (("species",), next_order(build_model(scenario)).delta)
        except continuum.ContinuumError:
            pass
        else:
            spec = VARIABLES["mean_next_order"]
            ds["mean_next_order"].attrs.update(units=spec.units, long_name=spec.long_name)
    return _method_attrs(ds, "monte-carlo", reason or "the adaptive Monte Carlo run",
                         accuracy)


def computed_window(scenario: Scenario, accuracy: float,
                    band_Hz=None) -> tuple[Scenario, tuple[float, float] | None]:
    """The scenario with the window an adaptive run would choose (:mod:`grmc.window`) where
    ``[run]`` leaves ``duration_s``, ``samples`` or ``settle_s`` out, so that the exact and
    linear-noise spectra span the same band as a Monte Carlo answer and the transient covers
    the slowest relaxation time, not the default microsecond."""
    from .simulate import scenario_with
    from .window import choose_window, given_run_keys

    if {"duration_s", "samples", "settle_s"} <= given_run_keys(scenario):
        return scenario, band_Hz
    try:
        choice = choose_window(scenario_with(scenario, accuracy=float(accuracy)),
                               accuracy=float(accuracy), band_Hz=band_Hz,
                               max_seconds=scenario.run.max_seconds, first=None, workers=1)
    except (ScenarioError, continuum.ContinuumError):  # no time scale: keep the window
        return scenario, band_Hz
    rs = choice.scenario.run
    return scenario_with(scenario, duration_s=rs.duration_s, samples=rs.samples,
                         settle_s=rs.settle_s), tuple(map(float, choice.band_Hz))


def band_frequencies(band_Hz: tuple[float, float]) -> np.ndarray:
    """The edges of the bands of 10 per decade covering ``band_Hz``, with each band's
    geometric centre between them: 20 points per decade, the exact solver's resolvents
    spent where the band-averaged spectra need them [Hz]."""
    from .bands import BANDS_PER_DECADE

    k1 = math.floor(math.log10(band_Hz[0]) * BANDS_PER_DECADE + 1e-9)
    k2 = math.ceil(math.log10(band_Hz[1]) * BANDS_PER_DECADE - 1e-9)
    return 10.0 ** (np.arange(2 * k1, 2 * k2 + 1) / (2.0 * BANDS_PER_DECADE))


def solve(scenario: Scenario, accuracy: float, *, max_states: int = DEFAULT_MAX_STATES,
          band_Hz=None, max_seconds: float | None = None, seed: int | None = None,
          workers=None, progress: bool = True, command: str | None = None):
    """Choose the method (:func:`choose_method`) and return its Dataset."""
    method, reason = choose_method(scenario, accuracy, max_states=max_states)
    return solve_with(method, reason, scenario, accuracy=accuracy, max_states=max_states,
                      band_Hz=band_Hz, max_seconds=max_seconds, seed=seed, workers=workers,
                      progress=progress, command=command)


def solve_with(method: Method, reason: str, scenario: Scenario, *, accuracy: float,
               max_states: int = DEFAULT_MAX_STATES, band_Hz=None,
               max_seconds: float | None = None, seed: int | None = None, workers=None,
               progress: bool = True, command: str | None = None, runner=None):
    """The Dataset of a method already chosen (:func:`choose_method`), with its reason.

    Parameters
    ----------
    method : {"exact", "linear-noise", "monte-carlo"}
    reason : str  The chooser's sentence, stored as ``method_reason``
    scenario : Scenario
    accuracy : float  Relative accuracy target [1]
    max_states : int  Exact: the state limit [states]
    band_Hz : (float, float), optional  The band the spectra must reach the accuracy in
        (default ``[run] band_Hz``, else ``[readout] band_Hz``, else from the linear-noise
        corners) [Hz]
    max_seconds, seed, workers, progress, runner : Monte Carlo only: as in
        :func:`grmc.simulate.run`
    command : str, optional  Command line recorded in ``history``
    """
    readout_band = scenario.readout.band_Hz if scenario.readout is not None else None
    if band_Hz is None and scenario.run.band_Hz is None and readout_band is not None:
        band_Hz = tuple(map(float, readout_band))  # the band the readout is judged in
    if method != "monte-carlo":
        scenario, band = computed_window(scenario, accuracy, band_Hz)
        pulse = scenario.start.excess_pairs > 0  # the transient is part of the answer
        rb = scenario.readout.band_Hz if scenario.readout is not None else None
        if band is not None and rb is not None:  # the spectra also span the readout band
            band = (min(band[0], rb[0]), max(band[1], rb[1]))
    if method == "exact":
        return solve_exact(scenario, accuracy=accuracy, reason=reason, max_states=max_states,
                           command=command, transient=pulse,
                           freqs=None if band is None else band_frequencies(band))
    if method == "linear-noise":
        return solve_linear_noise(scenario, accuracy=accuracy, reason=reason, command=command,
                                  transient=pulse)
    return solve_monte_carlo(scenario, accuracy, reason=reason, band_Hz=band_Hz,
                             max_seconds=max_seconds, seed=seed, workers=workers,
                             progress=progress, command=command, runner=runner)
