"""``grmc exact``: the master-equation solution of a scenario as an output Dataset.

Same variable names as ``grmc run`` where they mean the same thing; the exact values carry
no standard errors.  The spectra are evaluated on a logarithmic grid spanning the band a
Monte Carlo run of the same scenario would resolve (1/duration_s to the Nyquist rate).
"""

from __future__ import annotations

import numpy as np

from . import continuum, exact
from .bandnoise import band_variables
from .dataset import finish
from .model import build_model
from .readout import counts_events, describe_current, exact_current, lna_current
from .scenario import Scenario
from .theory import theory

__all__ = ["exact_dataset", "exact_frequencies", "POINTS_PER_DECADE"]

POINTS_PER_DECADE = 20


def exact_frequencies(scenario: Scenario) -> np.ndarray:
    """Log-spaced frequencies from 1/duration_s to samples/(2 duration_s) [Hz]."""
    run = scenario.run
    lo = 1.0 / run.duration_s
    hi = run.samples / (2.0 * run.duration_s)
    n = max(2, int(np.ceil(np.log10(hi / lo) * POINTS_PER_DECADE)) + 1)
    return np.geomspace(lo, hi, n)


def exact_dataset(scenario: Scenario, *, command: str | None = None,
                  max_states: int = exact.DEFAULT_MAX_STATES, transient: bool = True,
                  freqs: np.ndarray | None = None):
    """Solve the scenario exactly and return the Dataset ``grmc exact`` writes.

    With ``transient=False`` the transient from the start state (``count_mean``,
    ``count_var``) is left out: the stationary law and spectra only.  ``freqs`` [Hz]
    replaces the default grid (:func:`exact_frequencies`).

    Raises
    ------
    grmc.exact.StateSpaceTooLarge
        When the truncation would need more than ``max_states`` states.
    """
    model = build_model(scenario)
    freqs = exact_frequencies(scenario) if freqs is None else np.asarray(freqs, dtype=float)
    run = scenario.run
    t = np.arange(run.samples) * (run.duration_s / run.samples)
    # The transient starts where a Monte Carlo window starts: the engine's start state (the
    # neutral state nearest the continuum steady state) evolved through settle_s, plus the
    # pulse.  Without a pulse, settling is followed exactly (times shifted by settle_s); with
    # one, the pulse is added to the start state itself (noted in the file's attributes).
    x0 = model.nearest_neutral_state(continuum.steady_state(model))
    pulse = scenario.start.excess_pairs
    if pulse:
        x0[:2] += pulse
        t_eval, note = t, "start state plus excess_pairs at t = 0 (settling not applied)"
    else:
        t_eval, note = t + run.settle_s, "start state evolved through settle_s"
    res = exact.solve(model, freqs=freqs, times=t_eval if transient else None, x0=x0,
                      max_states=max_states)
    start = res.transient_mean[0] if transient else x0.astype(np.float64)
    th = theory(model, freqs, times=t, start=start, current=scenario.readout is not None)
    # the file's species: with a spread trap level its total beside the sub-levels (the
    # projections below are identities otherwise; the theory is projected in grmc.theory)
    proj, pmat = model.project, model.project_matrix
    sub = model.has_sublevels
    data = {
        "stationary_mean": (("species",), proj(res.mean)),
        "stationary_var": (("species",), np.diag(pmat(res.covariance)).copy() if sub
                           else res.var),
        "psd": (("species", "frequency"), np.real(np.einsum("iif->if", pmat(res.psd_matrix)))
                if sub else res.psd),
        "probability_outside": ((), float(res.mass_outside)),
    }
    if transient:
        data["count_mean"] = (("species", "t"), proj(res.transient_mean).T)
        data["count_var"] = (("species", "t"), (res.transient_output_var if sub
                                                else res.transient_var).T)
    else:
        note = "transient not computed"
    states = np.rint(proj(res.states)).astype(np.int64)
    lo = int(states.min())
    hi = int(states.max())
    values = np.arange(lo, hi + 1, dtype=np.int64)
    hist = np.zeros((states.shape[1], values.size))
    for s in range(states.shape[1]):
        if sub:
            np.add.at(hist[s], states[:, s] - lo, res.probability)
        else:
            v, p = res.marginal(s)
            hist[s, v - lo] = p
    data["count_histogram"] = (("species", "count_value"), hist)
    data.update(th.variables)
    readout = scenario.readout
    attrs = {}
    if readout is not None:
        cur = exact_current(model, res)
        data["current_mean"] = ((), cur.mean)
        data["current_psd"] = (("frequency",), cur.psd)
        if counts_events(model):
            data["current_shot_noise"] = ((), cur.white)
        if readout.band_Hz is not None:  # exact spectrum: no sampling interval
            data.update(band_variables(freqs, cur.psd, readout.band_Hz,
                                       lna=lambda f: lna_current(model, f).psd))
        attrs.update({"readout_bias_V": readout.bias_V, "readout_length_cm": readout.length_cm,
                      "readout_current": describe_current(model)})
    coords = {
        "t": ("t", t),
        "species": ("species", np.array(model.output_species, dtype=object)),
        "frequency": ("frequency", freqs),
        "count_value": ("count_value", values),
    }
    import xarray as xr  # after the solve: a refusal answers without loading xarray

    ds = xr.Dataset(data, coords=coords)
    return finish(
        ds, title=scenario.title, scenario_toml=scenario.text, command=command,
        method="exact master equation (finite state projection)",
        probability_outside=float(res.mass_outside), n_states=int(res.n_states),
        max_pairs=int(res.max_pairs), transient_start=note,
        volume_cm3=float(scenario.volume.volume_cm3),
        **attrs,
    )
