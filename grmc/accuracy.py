"""How accurate is a run so far: the worst relative 95 % half-width of what is checked.

Checked are every species' stationary mean and variance (standard errors from the spread of
the per-trajectory time averages, see :class:`grmc.accumulators.Stationary`) and every band
of the band-averaged count spectra, and of the readout current's where there is one, whose
centre lies inside the target band (:mod:`grmc.bands`).  A quantity that is exactly zero
with no spread (a count that never moves) is not checked: it has no relative error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .accumulators import Accumulators
from .bands import band_average, relative_half_width
from .plan import Plan

__all__ = ["Z95", "Reached", "worst_half_width"]

#: Two-sided 95 % point of the normal law (common practice).
Z95 = 1.959963984540054


@dataclass(frozen=True)
class Reached:
    """The worst relative half-width and where it is.

    Attributes
    ----------
    worst : float  Largest relative 95 % half-width of the checked quantities [1]
    where : str  Which quantity, e.g. "psd_band electrons at 1.6e+04 Hz"
    bands : int  Bands checked (count and current spectra together) [1]
    """

    worst: float
    where: str
    bands: int


def _stationary(plan: Plan, acc: Accumulators) -> list[tuple[float, str]]:
    if acc.n < 2:
        return [(np.inf, "stationary variance (one trajectory)")]
    v = acc.stationary.variables(plan)
    out = []
    species = plan.species
    for name in ("stationary_mean", "stationary_var"):
        val, err = v[name][1], v[f"{name}_stderr"][1]
        for s, sp in enumerate(species):
            if val[s] == 0 and err[s] == 0:
                continue
            rel = Z95 * err[s] / abs(val[s]) if val[s] != 0 else np.inf
            out.append((float(rel), f"{name} {sp}"))
    return out


def _bands(plan: Plan, spec, labels: list[str], band_Hz) -> list[tuple[float, str]]:
    b = band_average(plan.frequencies, spec.mean(), spec.segments(plan))
    inside = np.flatnonzero(b.inside(band_Hz))
    mean = np.atleast_2d(b.mean)
    rel = np.atleast_2d(relative_half_width(b.mean, b.low, b.high))
    out = []
    for row, label in enumerate(labels):
        for j in inside:
            if mean[row, j] == 0:
                continue
            out.append((float(rel[row, j]), f"{label} at {b.centres[j]:.3g} Hz"))
    return out


def worst_half_width(plan: Plan, acc: Accumulators, band_Hz: tuple[float, float]) -> Reached:
    """The worst relative 95 % half-width over the checked quantities.

    Parameters
    ----------
    plan : Plan
    acc : Accumulators  Merged so far
    band_Hz : (float, float)  Target band [Hz]

    Returns
    -------
    Reached  (worst = inf when no band of the spectrum lies inside ``band_Hz``)
    """
    checks = _stationary(plan, acc)
    labels = [f"psd_band {s}" for s in plan.species]
    bands = _bands(plan, acc.count_spectrum, labels, band_Hz)
    if acc.current_spectrum is not None:
        bands += _bands(plan, acc.current_spectrum, ["current_psd_band"], band_Hz)
    if not bands:
        return Reached(np.inf, f"no band of the spectrum inside {band_Hz[0]:g}-{band_Hz[1]:g} Hz",
                       0)
    checks += bands
    worst, where = max(checks, key=lambda c: (np.nan_to_num(c[0], nan=np.inf), c[1]))
    return Reached(float(np.nan_to_num(worst, nan=np.inf)), where, len(bands))
