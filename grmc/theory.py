"""The theory beside every simulated or exact answer, computed once per model.

``grmc run``, ``grmc exact`` and ``grmc sweep`` all report the continuum steady state, the
linear-noise variances, relaxation times and spectra, the continuum transient, the readout
current's linear-noise mean and spectrum, and the continuum response to a modulated drive.
:func:`theory` computes them in one place and returns them under the output registry's
names (:data:`grmc.dataset.VARIABLES`), on the output species: with a spread trap level a
level's total ``trapped:<label>`` beside its sub-levels (the projection
:meth:`grmc.model.Model.project` of every count, ``P C P^T`` of every covariance and
spectral matrix); without a spread the projection is the identity.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import continuum
from .model import Model
from .next_order import mean_correction
from .readout import current_gradient, lna_current

__all__ = ["Theory", "theory"]


@dataclass
class Theory:
    """Continuum and linear-noise answers for one model.

    Attributes
    ----------
    steady : ndarray (S,)  Continuum steady state on the model's species [count]
    variables : dict  Output variables on the output species, ``name: (dims, values)``
    smat : ndarray (S, S, F) or None  Linear-noise spectral matrix on the model's species
        [count^2/Hz]
    """

    steady: np.ndarray
    variables: dict = field(default_factory=dict)
    smat: np.ndarray | None = None


def theory(model: Model, freqs: np.ndarray | None = None, *, times: np.ndarray | None = None,
           start: np.ndarray | None = None, current: bool = False,
           drive: bool = False, steady: np.ndarray | None = None) -> Theory:
    """Continuum, linear-noise, current and drive-response theory of a model.

    Parameters
    ----------
    model : Model
    freqs : ndarray, optional  Frequencies of the spectra [Hz]
    times : ndarray, optional  Times of the continuum transient [s] (needs ``start``)
    start : ndarray, optional  State the transient starts from at ``times[0]``, on the
        model's species [count]
    current : bool  Also the readout current (the scenario has a ``[readout]``)
    drive : bool  Also the continuum response at the model's modulation frequency
    steady : ndarray, optional  The continuum steady state when already known [count]

    Returns
    -------
    Theory  with the variables ``steady_continuum``, ``var_lna``, ``relaxation_time_lna``,
    ``mean_next_order`` (:mod:`grmc.next_order`),
    and as asked ``count_continuum``, ``psd_lna``, ``current_psd_lna``,
    ``current_mean_continuum``, ``response_*_continuum``.

    Notes
    -----
    The linear-noise covariance solves the Lyapunov equation A C + C A^T + B = 0 and the
    spectral matrix is S(w) = 2 (A + i w)^-1 B (A^T - i w)^-1 (van Kampen, Stochastic
    Processes in Physics and Chemistry, 3rd ed., 2007, ch. X; see :mod:`grmc.continuum`).
    """
    ss = continuum.steady_state(model) if steady is None else steady
    lna = continuum.lna(model)
    out = Theory(steady=ss)
    v = out.variables
    v["steady_continuum"] = (("species",), model.project(ss))
    v["var_lna"] = (("species",), np.diag(model.project_matrix(lna.covariance)).copy())
    v["relaxation_time_lna"] = (("mode",), np.asarray(lna.relaxation_times, dtype=float))
    v["mean_next_order"] = (("species",), model.project(mean_correction(model)))
    if times is not None:
        v["count_continuum"] = (("species", "t"),
                                model.project(continuum.transient(model, start, times)).T)
    if freqs is not None:
        out.smat = continuum.lna_psd(model, freqs)
        v["psd_lna"] = (("species", "frequency"),
                        np.real(np.einsum("iif->if", model.project_matrix(out.smat))))
        if current:
            cur = lna_current(model, freqs, smat=out.smat, x=ss)
            v["current_psd_lna"] = (("frequency",), cur.psd)
            v["current_mean_continuum"] = ((), cur.mean)
    if drive and model.modulation is not None:
        v.update(_drive(model, ss, current))
    return out


def _drive(model: Model, ss: np.ndarray, current: bool) -> dict:
    """Continuum response at the drive frequency (linearised transfer function)."""
    channel, kind, freq, depth, _ = model.modulation
    c_amp, c_ph = continuum.drive_response(model, channel=channel, kind=kind,
                                           frequency_Hz=freq, depth=depth)
    resp = c_amp * np.exp(1j * c_ph)  # on the model's species; the file's are sums of them
    if model.has_sublevels:
        c_amp, c_ph = np.abs(model.project(resp)), np.angle(model.project(resp))
    out = {"response_amplitude_continuum": (("species",), c_amp),
           "response_phase_continuum": (("species",), c_ph)}
    if current:
        # linearised: the current's continuum response is its gradient on the count response
        # (the modulated optical channel itself moves no carrier across the boundary)
        i_c = current_gradient(model, ss) @ resp
        out["current_response_amplitude_continuum"] = ((), float(abs(i_c)))
        out["current_response_phase_continuum"] = ((), float(np.angle(i_c)))
    return out
