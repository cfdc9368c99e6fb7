"""Trap levels with a spread of time constants: from the model's sub-levels to the outputs.

A level with ``spread_decades > 0`` is simulated as sub-levels, each a species of its own
(:mod:`grmc.model`).  The output files show, beside the sub-levels, the level's total
occupied count ``trapped:<label>``, the sum over its sub-levels.  This module turns what a
trajectory records for the model's species into the same records for the output species;
everything linear (samples, fine-bin averages, time integrals) is the sum exactly.

The engine integrates the square of each species over the window, not of sums, so the time
integral of a total's square is estimated from its values at the sample times (an unbiased
estimate of the same stationary mean square, with the variance of ``samples`` points instead
of the continuous record).
"""

from __future__ import annotations

import numpy as np

from .engine.tables import Outputs

__all__ = ["ProjectedTrajectory", "project_trajectory", "lift", "is_sublevel", "not_analysed",
           "trap_time_constant",
           "spread_band", "INNER_TRIM_DECADES"]

#: Decades cut from each end of a spread's band for the 1/f fit: near the ends the sum of
#: Lorentzians bends over to the plateau and to 1/f^2 (within one decade of the ends the
#: local slope stays within 7 % of -1 for a log-uniform spread).
INNER_TRIM_DECADES = 1.0


#: A trajectory's records on the output species (the fields the run's reductions read): the
#: engine's record of one trajectory (:class:`grmc.engine.tables.Outputs`), on other species.
ProjectedTrajectory = Outputs


def project_trajectory(res, model, duration_s: float):
    """The records of one trajectory on the model's output species.

    Parameters
    ----------
    res : TrajectoryResult or the like  Records on the model's species
    model : Model
    duration_s : float  Length of the recorded window [s]

    Returns
    -------
    ``res`` itself when the model has no sub-levels, else a :class:`ProjectedTrajectory`.
    """
    if not model.has_sublevels:
        return res
    P = model.output_matrix
    samples = np.rint(res.samples @ P.T).astype(np.int64)
    integ2 = np.empty(P.shape[0])
    for o, row in enumerate(P):
        members = np.flatnonzero(row)
        if members.size == 1:  # one model species: its exact integral
            integ2[o] = res.integ2[members[0]]
        else:  # a sum: mean square at the sample times, times the window
            integ2[o] = float(np.mean(samples[:, o].astype(np.float64) ** 2)) * duration_s
    return ProjectedTrajectory(samples=samples, bins=res.bins @ P.T, integ=P @ res.integ,
                               integ2=integ2, events=res.events, final=res.final,
                               flows=res.flows)


def lift(model, x_out: np.ndarray) -> np.ndarray:
    """Output-species counts back on the model's species (every model species is also an
    output species) [count]."""
    x_out = np.asarray(x_out)
    if not model.has_sublevels:
        return x_out
    index = [model.output_species.index(name) for name in model.species]
    return x_out[..., index]


def is_sublevel(name: str) -> bool:
    """True for a sub-level species ``trapped:<label>#j`` of a spread trap level."""
    return "#" in str(name)


def not_analysed(n_segments: float):
    """The Lorentzian analysis left out for a sub-level (its Lorentzian is known from the
    linear-noise answer, and fitting a dozen sub-levels would cost more than the run)."""
    from .spectra import SpectrumAnalysis

    nan = float("nan")
    return SpectrumAnalysis(kind="unresolved", components=(), chi2_dof=nan, p_value=nan,
                            band=(nan, nan), n_segments=float(n_segments),
                            message="a sub-level of a spread trap level: not analysed")


def trap_time_constant(trap, material, n_cm3: float, p_cm3: float) -> float:
    """Relaxation time of one trap of a level with its coefficients as given [s].

    ``1/tau = c_n (n + n_1) + c_p (p + p_1)``: the sum of the capture and emission rates of
    one trap, the filled and empty dwell times' ``1/tau_1 + 1/tau_0`` of its telegraph
    signal (Machlup, J. Appl. Phys. 25, 341, 1954).

    Parameters
    ----------
    trap : Trap  The scenario's level
    material : Material
    n_cm3, p_cm3 : float  Free electron and hole densities [cm^-3]
    """
    from .model import BOLTZMANN_EV_K

    kT = BOLTZMANN_EV_K * material.temperature_K
    ni = material.intrinsic_density_cm3
    n1, p1 = ni * np.exp(trap.energy_eV / kT), ni * np.exp(-trap.energy_eV / kT)
    rate = trap.electron_capture_cm3_s * (n_cm3 + n1) + trap.hole_capture_cm3_s * (p_cm3 + p1)
    return float(1.0 / rate)


def spread_band(model, steady: np.ndarray) -> tuple[float, float] | None:
    """The inner band of the model's spread levels, where their sum of Lorentzians is 1/f
    (McWhorter 1957) [Hz].

    A level with time constant tau_0 (:func:`trap_time_constant` at the steady state) spread
    over D decades has corners from ``10^-D / (2 pi tau_0)`` to ``1 / (2 pi tau_0)``; the
    band is that range less ``min(INNER_TRIM_DECADES, D/4)`` decades at each end (the union
    over spread levels).  None when no level has a spread.
    """
    vol = model.volume_cm3
    n, p = float(steady[0]) / vol, float(steady[1]) / vol
    lo = hi = None
    for trap in model.scenario.traps:
        decades = float(trap.spread_decades)
        if decades <= 0:
            continue
        f0 = 1.0 / (2.0 * np.pi * trap_time_constant(trap, model.scenario.material, n, p))
        trim = min(INNER_TRIM_DECADES, decades / 4.0)
        a, b = f0 * 10.0 ** (trim - decades), f0 * 10.0 ** (-trim)
        lo = a if lo is None else min(lo, a)
        hi = b if hi is None else max(hi, b)
    return None if lo is None else (float(lo), float(hi))
