"""The linear-noise answer of a scenario as an output Dataset, named as ``grmc exact`` files.

Used by :func:`grmc.solve.solve_linear_noise` where the volume is too large for the master
equation and the next-order error is below the accuracy asked for.  The same frequencies and
times as an exact file of the scenario; every value comes from :mod:`grmc.continuum` and
:mod:`grmc.next_order`.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from . import continuum
from .bandnoise import band_variables
from .dataset import finish
from .exact_output import exact_frequencies
from .model import Model, build_model
from .next_order import next_order
from .readout import counts_events, describe_current, lna_current
from .scenario import Scenario

__all__ = ["linear_noise_dataset", "covariance_from_zero"]


def covariance_from_zero(lna: continuum.LNAResult, t: np.ndarray) -> np.ndarray:
    """Linear-noise covariance grown from a sharp start about the steady state [count^2].

    Parameters
    ----------
    lna : grmc.continuum.LNAResult
    t : ndarray (T,)  Times >= 0 on a uniform grid starting at 0 [s]

    Returns
    -------
    ndarray (T, S, S)

    Notes
    -----
    With ``dS/dt = A S + S A^T + D`` and ``S(0) = 0`` at fixed ``A``, ``D`` (the linearisation
    about the steady state), ``S(t) = S_inf - exp(A t) S_inf exp(A^T t)`` (van Kampen 2007,
    ch. X), evaluated on the reduced (charge-conserving) system and mapped back.
    """
    a_r = np.asarray(lna.reduced_jacobian)
    proj = np.asarray(lna.projection)
    # the reduced covariance: P is the identity on the independent species
    s_inf = np.asarray(lna.covariance)[np.ix_(lna.independent, lna.independent)]
    n_s = proj.shape[0]
    out = np.zeros((t.size, n_s, n_s))
    if a_r.size == 0 or t.size == 0:
        return out
    dt = float(t[1] - t[0]) if t.size > 1 else 0.0
    step = scipy.linalg.expm(a_r * dt)
    prop = np.eye(a_r.shape[0])
    for k in range(t.size):
        s_r = s_inf - prop @ s_inf @ prop.T
        out[k] = proj @ s_r @ proj.T
        prop = step @ prop
    return out


def _current_vars(model: Model, freqs: np.ndarray, smat: np.ndarray, x: np.ndarray) -> tuple:
    readout = model.scenario.readout
    theory = lna_current(model, freqs, smat=smat, x=x)
    data = {
        "current_mean": ((), theory.mean),
        "current_psd": (("frequency",), theory.psd),
        "current_psd_lna": (("frequency",), theory.psd),
        "current_mean_continuum": ((), theory.mean),
    }
    if counts_events(model):
        data["current_shot_noise"] = ((), theory.white)
    if readout.band_Hz is not None:  # a computed spectrum: no sampling interval
        data.update(band_variables(freqs, theory.psd, readout.band_Hz,
                                   lna=lambda f: lna_current(model, f, x=x).psd))
    attrs = {"readout_bias_V": readout.bias_V, "readout_length_cm": readout.length_cm,
             "readout_current": describe_current(model)}
    return data, attrs


def linear_noise_dataset(scenario: Scenario, *, command: str | None = None,
                         transient: bool = True):
    """The linear-noise answer with the variable names of an exact file.

    With ``transient=False`` the continuum transient and the covariance grown from the start
    (``count_mean``, ``count_var``, ``count_continuum``) are left out.

    Raises
    ------
    grmc.continuum.ContinuumError
        Where the scenario has no stable steady state.
    """
    import xarray as xr

    model = build_model(scenario)
    freqs = exact_frequencies(scenario)
    run = scenario.run
    t = np.arange(run.samples) * (run.duration_s / run.samples)
    no = next_order(model)
    lna = continuum.lna(model)
    smat = continuum.lna_psd(model, freqs)
    psd = np.real(np.einsum("iif->if", smat))
    data = {
        "stationary_mean": (("species",), no.steady + no.delta),
        "stationary_var": (("species",), no.var_lna),
        "steady_continuum": (("species",), no.steady),
        "var_lna": (("species",), no.var_lna),
        "mean_next_order": (("species",), no.delta),
        "relaxation_time_lna": (("mode",), np.asarray(lna.relaxation_times, dtype=float)),
        "psd": (("species", "frequency"), psd),
        "psd_lna": (("species", "frequency"), psd),
    }
    if transient:
        x0 = model.nearest_neutral_state(no.steady).astype(np.float64)
        x0[:2] += scenario.start.excess_pairs
        mean_t = continuum.transient(model, x0, t)
        var_t = np.einsum("tii->ti", covariance_from_zero(lna, t))
        data["count_mean"] = (("species", "t"), mean_t.T)
        data["count_var"] = (("species", "t"), var_t.T)
        data["count_continuum"] = (("species", "t"), mean_t.T)
    attrs = {}
    if scenario.readout is not None:
        more, attrs = _current_vars(model, freqs, smat, no.steady)
        data.update(more)
    coords = {
        "t": ("t", t),
        "species": ("species", np.array(model.species, dtype=object)),
        "frequency": ("frequency", freqs),
    }
    ds = xr.Dataset(data, coords=coords)
    return finish(
        ds, title=scenario.title, scenario_toml=scenario.text, command=command,
        method="linear-noise approximation with the next-order correction of the means",
        transient_start="start state (nearest neutral state to the continuum steady state, "
        "plus excess_pairs) at t = 0; covariance grown from zero about the steady state"
        if transient else "transient not computed",
        volume_cm3=float(scenario.volume.volume_cm3), **attrs,
    )
