"""The readout current of a model: its mean and spectrum from the theory (linear noise, exact).

Two readouts (``[readout] collection``):

* ``"mean"``: the drift current of the counts, ``I = a_e N_e + a_h N_h`` with
  ``a = q bias / L^2 mu`` (:func:`grmc.spectra.current_scale`); its spectrum is that
  combination of the count spectral matrix (G-R noise only).
* ``"events"``: ``q`` times the flux of carriers crossing the collecting boundary (the
  channels with a ``flow`` weight in :mod:`grmc.model`: collection at an ohmic contact, and
  exchange with a ``[reservoir]``).  Its spectrum is the flux spectrum of
  :func:`grmc.continuum.flux_lna` (linear noise) or of the master equation
  (:func:`grmc.exact.flux_spectrum`): the shot noise of every crossing plus the G-R part and
  the correlation of each crossing with the count it changes.

The Monte Carlo estimate is made from the simulated crossings themselves (``grmc.simulate``);
this module gives the numbers it is compared with.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from . import continuum, spectra
from .exact import ExactResult
from .model import ELEMENTARY_CHARGE_C, Model

__all__ = ["CurrentTheory", "counts_events", "current_gradient", "describe_current",
           "exact_current", "lna_current", "photon_current_psd"]


class CurrentTheory(NamedTuple):
    """Theory of the readout current.

    Attributes
    ----------
    mean : float  Mean current [A]
    psd : ndarray (F,) or None  One-sided PSD [A^2/Hz] (None: the exact solution was
        solved without frequencies)
    white : float  High-frequency (shot) level, ``2 q^2 sum_r flow_r^2 <a_r>``; 0 with
        ``collection = "mean"`` [A^2/Hz]
    """

    mean: float
    psd: np.ndarray
    white: float


def counts_events(model: Model) -> bool:
    """True when the readout current is counted from crossing events."""
    readout = model.scenario.readout
    return readout is not None and readout.collection == "events"


def describe_current(model: Model) -> str:
    """One line saying what the readout current is (stored with the data, used by exports)."""
    if not counts_events(model):
        return ("drift current of the biased bar, I = q bias/L^2 (mu_n N_e + mu_p N_h): "
                "generation-recombination noise of the counts")
    res = model.scenario.reservoir
    if res is None:
        return ("collected current of a photoconductor bar, q times the carriers reaching "
                "their collecting contact per second (replaced at the ohmic contacts): shot "
                "noise of collection plus generation-recombination noise")
    return (f"junction current, q times ({res.carrier} swept out - {res.carrier} entering "
            "from the neighbouring region) per second: shot noise of all crossings plus "
            "generation-recombination noise")


def current_gradient(model: Model, x: np.ndarray) -> np.ndarray:
    """d<I>/dx of the readout current at the counts x [A per count], shape (species,).

    ``q sum_r flow_r dw_r/dx`` for a current of crossing events (the macroscopic laws of
    :meth:`grmc.model.Model.rate_jacobian`), ``(a_e, a_h, 0, ...)`` for the drift current.
    The linearised response of the current to a small change of the counts (e.g. the drive
    response of :func:`grmc.continuum.drive_response`) is this dotted with that change.
    """
    if counts_events(model):
        flow = np.asarray(model.flow_weight, dtype=np.float64)
        return ELEMENTARY_CHARGE_C * (flow @ model.rate_jacobian(np.asarray(x, float)))
    out = np.zeros(model.n_species)
    out[0], out[1] = spectra.current_scale(model.scenario.readout)
    return out


def lna_current(model: Model, freqs: np.ndarray, *, smat: np.ndarray | None = None,
                x: np.ndarray | None = None) -> CurrentTheory:
    """Readout current of the linear-noise approximation about the steady state.

    Parameters
    ----------
    model : Model  With a ``[readout]``
    freqs : ndarray (F,)  Frequencies [Hz]
    smat : ndarray (S, S, F), optional  The count spectral matrix at ``freqs`` if already
        computed (:func:`grmc.continuum.lna_psd`) [count^2/Hz]
    x : ndarray (S,), optional  The steady state [count], for the drift current; a current
        of crossing events is expanded about the solver's own steady state (which keeps
        near-full trap levels' empty count exactly), solved once
    """
    q = ELEMENTARY_CHARGE_C
    if counts_events(model):
        flux = continuum.flux_lna(model, freqs)  # its own steady state, with exact empty traps
        return CurrentTheory(q * flux.mean, q * q * flux.psd, q * q * flux.white)
    readout = model.scenario.readout
    if smat is None:
        smat = continuum.lna_psd(model, freqs)
    if x is None:
        x = continuum.steady_state(model)
    a_e, a_h = spectra.current_scale(readout)
    return CurrentTheory(float(a_e * x[0] + a_h * x[1]),
                         spectra.current_psd_from_matrix(smat, a_e, a_h), 0.0)


def exact_current(model: Model, result: ExactResult) -> CurrentTheory:
    """Readout current of the exact master-equation solution (with its ``freqs``)."""
    q = ELEMENTARY_CHARGE_C
    if counts_events(model):
        psd = None if result.flux_psd is None else q * q * result.flux_psd
        return CurrentTheory(q * result.flux_mean, psd, q * q * result.flux_white)
    a_e, a_h = spectra.current_scale(model.scenario.readout)
    psd = (None if result.psd_matrix is None else
           spectra.current_psd_from_matrix(result.psd_matrix, a_e, a_h))
    return CurrentTheory(float(a_e * result.mean[0] + a_h * result.mean[1]), psd, 0.0)


#: The channel whose own noise is the photon (background) shot noise.
OPTICAL_CHANNEL = "optical generation"


def photon_current_psd(model: Model, freqs: np.ndarray) -> np.ndarray:
    """The part of the readout current's linear-noise spectrum the light's own shot noise drives.

    Optical pairs are made at random (a Poisson stream of rate G V): this is the current
    spectrum that stream alone gives through the pixel's response,
    ``2 G V |g(f)|^2`` (:func:`grmc.continuum.channel_psd`).  Where the photocarriers'
    recombination is the only other noise (a background-limited pixel) it adds as much
    again, so the background-limited G-R level is twice this.  Zero without light.

    Parameters
    ----------
    model : Model  With a ``[readout]``
    freqs : ndarray (F,)  Frequencies [Hz]

    Returns
    -------
    ndarray (F,)  [A^2/Hz]
    """
    names = [c.name for c in model.channels]
    f = np.atleast_1d(np.asarray(freqs, dtype=float))
    if OPTICAL_CHANNEL not in names:
        return np.zeros(f.size)
    if counts_events(model):  # q times the flux of crossings
        flow = np.asarray(model.flow_weight, dtype=np.float64)
        parts = ELEMENTARY_CHARGE_C**2 * continuum.channel_psd(model, f, flow=flow)
    else:  # the drift current of the counts
        gradient = current_gradient(model, continuum.steady_state(model))
        parts = continuum.channel_psd(model, f, gradient)
    return parts[:, names.index(OPTICAL_CHANNEL)]
