"""Noise in a band: the rms of a spectrum integrated from f1 to f2, with its 95 % interval.

The number a readout designer asks first: ``rms = sqrt(integral_{f1}^{f2} S(f) df)`` of the
one-sided spectrum (Parseval: the integral of the one-sided PSD over f > 0 is the variance;
over a band it is the variance passed by an ideal band-pass filter).

Pure functions of arrays: a run, an exact solution or any later solver hands in its
frequencies, its spectrum and, for an estimate, the 95 % interval; :func:`band_variables`
returns the output variables ``<prefix>noise_rms`` (``_low``, ``_high``, ``_lna``).

Public API
----------
band_weights(freqs, band) -> ndarray
band_noise(freqs, psd, band, *, low=None, high=None, level=0.95) -> BandNoise
band_variables(freqs, psd, band, *, low=None, high=None, lna=None, prefix="current_") -> dict
"""

from __future__ import annotations

import math
from typing import Callable, NamedTuple

import numpy as np

__all__ = ["BandNoise", "band_weights", "band_noise", "band_variables", "LNA_PER_DECADE"]

#: Grid density for integrating a theory curve given as a function (log-spaced trapezoid,
#: relative error about 1e-4 for Lorentzians) [points per decade].
LNA_PER_DECADE = 100


class BandNoise(NamedTuple):
    """rms noise over a band.

    Attributes
    ----------
    rms : float  sqrt of the band power [unit]
    low, high : float  95 % interval of rms (equal to rms for an exact spectrum) [unit]
    power : float  Integral of S over the band [unit^2]
    dof : float  Effective chi-squared degrees of freedom of the power estimate (inf for an
        exact spectrum) [1]
    """

    rms: float
    low: float
    high: float
    power: float
    dof: float


def band_weights(freqs: np.ndarray, band: tuple[float, float]) -> np.ndarray:
    """Weights w with ``sum_j w_j S_j`` = the integral over the band of the piecewise-linear
    interpolant of S on ``freqs``.

    Parameters
    ----------
    freqs : ndarray  Ascending frequencies [Hz]
    band : (f1, f2)  Band, inside [freqs[0], freqs[-1]] [Hz]

    Returns
    -------
    ndarray  [Hz]

    Raises
    ------
    ValueError  when the band is not inside the frequencies.

    Notes
    -----
    On each interval [f_j, f_j+1] (width h) clipped to [a, b], the hat functions integrate to
    ((f_j+1 - a)^2 - (f_j+1 - b)^2) / 2h for S_j and ((b - f_j)^2 - (a - f_j)^2) / 2h for
    S_j+1: the trapezoid rule with exact linear interpolation at the band edges.
    """
    f = np.asarray(freqs, dtype=float)
    f1, f2 = float(band[0]), float(band[1])
    if not (f1 < f2):
        raise ValueError(f"band must have f1 < f2, got {band!r}")
    if f.size < 2 or f1 < f[0] * (1 - 1e-12) or f2 > f[-1] * (1 + 1e-12):
        raise ValueError(f"band {f1:g} .. {f2:g} Hz is not inside the spectrum's "
                         f"{f[0]:g} .. {f[-1]:g} Hz")
    lo, hi = f[:-1], f[1:]
    a, b = np.maximum(lo, f1), np.minimum(hi, f2)
    use = b > a
    h = hi - lo
    w = np.zeros_like(f)
    left = np.where(use, ((hi - a) ** 2 - (hi - b) ** 2) / (2 * h), 0.0)
    right = np.where(use, ((b - lo) ** 2 - (a - lo) ** 2) / (2 * h), 0.0)
    w[:-1] += left
    w[1:] += right
    return w


def band_noise(freqs: np.ndarray, psd: np.ndarray, band: tuple[float, float], *,
               low: np.ndarray | None = None, high: np.ndarray | None = None,
               level: float = 0.95) -> BandNoise:
    """rms of a one-sided spectrum over a band, with the interval of an averaged periodogram.

    Parameters
    ----------
    freqs : ndarray  Ascending frequencies [Hz]
    psd : ndarray  One-sided spectrum [unit^2/Hz]
    band : (f1, f2)  [Hz], inside the frequencies
    low, high : ndarray, optional  The chi-squared interval of ``psd`` (an average of K
        periodogram values, the same K at every frequency); without them the spectrum is
        taken as exact [unit^2/Hz]
    level : float  Confidence level of (low, high) and of the result [1]

    Returns
    -------
    BandNoise

    Notes
    -----
    Each value is S_j chi^2_nu / nu with nu = 2K, independent across Fourier frequencies
    (Welch, IEEE Trans. Audio Electroacoust. 15, 70, 1967).  The band power
    P = sum_j w_j S_j is then a weighted sum of chi-squared variables, matched in mean and
    variance by P chi^2_m / m with m = nu (sum a_j)^2 / sum a_j^2, a_j = w_j S_j
    (Satterthwaite, Biometrics Bulletin 2, 110, 1946); the interval of P is
    [m P / chi2_{(1+level)/2, m}, m P / chi2_{(1-level)/2, m}] and that of the rms its square
    root.
    """
    s = np.asarray(psd, dtype=float)
    w = band_weights(freqs, band)
    use = w > 0
    if np.any(~np.isfinite(s[use])):
        nan = float("nan")
        return BandNoise(nan, nan, nan, nan, nan)
    a = w[use] * s[use]
    power = float(np.sum(a))
    rms = math.sqrt(max(power, 0.0))
    if low is None or high is None:
        return BandNoise(rms, rms, rms, power, math.inf)
    from scipy import stats

    from .spectra import segments_from_interval

    k = segments_from_interval(s[use], np.asarray(low, float)[use], np.asarray(high, float)[use],
                               level=level)
    m = 2.0 * k * power**2 / float(np.sum(a**2))
    tail = (1.0 - level) / 2.0
    p_lo = m * power / stats.chi2.ppf(1.0 - tail, m)
    p_hi = m * power / stats.chi2.ppf(tail, m)
    return BandNoise(rms, math.sqrt(p_lo), math.sqrt(p_hi), power, m)


def _curve_rms(curve: Callable[[np.ndarray], np.ndarray], band: tuple[float, float]) -> float:
    """rms of a theory curve S(f) over the band: trapezoid in ln f of S f [unit]."""
    f1, f2 = band
    n = max(3, int(math.ceil(LNA_PER_DECADE * math.log10(f2 / f1))) + 1)
    f = np.geomspace(f1, f2, n)
    return math.sqrt(float(np.trapezoid(curve(f) * f, np.log(f))))


def band_variables(freqs: np.ndarray, psd: np.ndarray, band: tuple[float, float], *,
                   low: np.ndarray | None = None, high: np.ndarray | None = None,
                   lna: Callable[[np.ndarray], np.ndarray] | None = None,
                   prefix: str = "current_") -> dict:
    """Output variables ``<prefix>noise_rms`` (and ``_low``, ``_high``, ``_lna``).

    Parameters
    ----------
    freqs, psd, low, high : as in :func:`band_noise`; ``low``/``high`` None for an exact
        spectrum (then no interval variables are written)
    band : (f1, f2)  [Hz]
    lna : callable, optional  The linear-noise spectrum as a function of frequency, integrated
        over the whole band on its own grid [unit^2/Hz]
    prefix : str  Variable name prefix

    Returns
    -------
    dict  name -> ((), value, {"band_Hz": [f1, f2]}), ready for an xarray Dataset; the
        estimate is NaN when the band reaches outside the frequencies of the spectrum (the
        linear-noise value is still given)
    """
    try:
        res = band_noise(freqs, psd, band, low=low, high=high)
    except ValueError:
        nan = float("nan")
        res = BandNoise(nan, nan, nan, nan, nan)
    attrs = {"band_Hz": np.array([float(band[0]), float(band[1])])}
    out = {f"{prefix}noise_rms": ((), res.rms, attrs)}
    if low is not None and high is not None:
        out[f"{prefix}noise_rms_low"] = ((), res.low, dict(attrs))
        out[f"{prefix}noise_rms_high"] = ((), res.high, dict(attrs))
    if lna is not None:
        out[f"{prefix}noise_rms_lna"] = ((), _curve_rms(lna, band), dict(attrs))
    return out
