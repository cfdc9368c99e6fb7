"""The 1/f read-out: a power law S(f) = K / f^alpha fitted to a spectrum over a band.

Traps whose time constants are spread log-uniformly over many decades add Lorentzians whose
sum falls as 1/f between the slowest and the fastest corner (McWhorter, in Semiconductor
Surface Physics, ed. Kingston, 1957).  :func:`fit_power_law` measures K and alpha with
standard errors from an averaged periodogram; :func:`corner_frequency` gives where the
fitted line meets a flat level (a G-R plateau or the white shot level).

The fit is a straight line in log-log, ``log S_hat = log K - alpha log f + e``.  An average
of k periodogram values is ``S chi^2_{2k} / 2k``, so e has the known mean ``psi(k) - log k``
and variance ``psi'(k)`` at every frequency (psi the digamma function); the line is fitted
by least squares after removing that mean, which is unbiased, with each periodogram value
weighted by the share of log f it stands for (1/f on the linear Fourier grid), so every
decade of the band counts alike: a spectrum that bends near one end of the band (a sum of
Lorentzians near the ends of its spread) then tilts the line no more than at the other,
where the even weights of the linear grid would let the top decade decide.  Standard errors:
jackknife over equal groups of trajectories where they are given (honours any correlation
between frequencies, e.g. of a few telegraph traps), else from the known variance psi'(k)
and the degrees of freedom of the interval (independent periodogram values).  numpy and
scipy only; pure functions.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = ["PowerLawFit", "fit_power_law", "corner_frequency", "usable_band", "fit_band",
           "flicker_variables"]

#: Fewest periodogram values a power-law fit accepts.
MIN_POINTS = 8


@dataclass(frozen=True)
class PowerLawFit:
    """S(f) = K / f^alpha fitted over a band.

    Attributes
    ----------
    K, K_err : float  Coefficient, the spectrum's value at 1 Hz on the fitted line
        (S = K / (f / 1 Hz)^alpha), and its standard error [unit^2/Hz]
    alpha, alpha_err : float  Exponent and its standard error [1]
    band : (float, float)  Lowest and highest frequency used [Hz]
    n_points : int  Periodogram values in the band [1]
    chi2_dof : float  Reduced chi-squared with the known log-periodogram variance [1]
    errors : str  "jackknife over B groups" or "interval degrees of freedom"
    message : str  Empty, or why there is no fit
    """

    K: float
    K_err: float
    alpha: float
    alpha_err: float
    band: tuple[float, float]
    n_points: int
    chi2_dof: float
    errors: str
    message: str = ""

    @property
    def ok(self) -> bool:
        """True when a line was fitted with finite errors."""
        return not self.message and math.isfinite(self.alpha_err)


def _nan_fit(band, n: int, why: str) -> PowerLawFit:
    nan = float("nan")
    return PowerLawFit(nan, nan, nan, nan, band, n, nan, "", why)


def _line(logf: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Weighted least-squares (log K, alpha) of y = log K - alpha log f."""
    X = np.stack([np.ones_like(logf), -logf], axis=1)
    sw = np.sqrt(w)
    return np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)[0]


def fit_power_law(freqs: np.ndarray, psd: np.ndarray, n_segments: float, *,
                  band: tuple[float, float], batches: np.ndarray | None = None
                  ) -> PowerLawFit:
    """Fit S(f) = K / f^alpha to an averaged periodogram over a band.

    Parameters
    ----------
    freqs : array (n,)  Frequencies [Hz]
    psd : array (n,)  Averaged periodogram, one-sided [unit^2/Hz]
    n_segments : float  k, periodogram values averaged at each frequency [1]
    band : (float, float)  Fit f_lo <= f <= f_hi [Hz]
    batches : array (B, n), optional  Mean periodograms of B >= 2 disjoint, equally large
        groups of trajectories whose mean is ``psd``: jackknife standard errors [unit^2/Hz]

    Returns
    -------
    PowerLawFit  NaN values with a message when fewer than :data:`MIN_POINTS` positive
        values lie in the band.

    Notes
    -----
    ``log S_hat(f) = log K - alpha log f + e``, ``E e = psi(k) - log k``,
    ``var e = psi'(k)`` (the log of a scaled chi-squared with 2k degrees of freedom); weights
    ``w_i ~ 1/f_i``; without batches ``cov = psi'(k) (X^T W X)^-1 X^T W^2 X (X^T W X)^-1``.
    Jackknife: leave one group out,
    refit (with k (B - 1) / B), variance ``(B - 1)/B sum (theta_i - theta_bar)^2``.

    References
    ----------
    P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70 (1967) (averaged periodogram);
    J. W. Tukey, Ann. Math. Statist. 29, 614 (1958) (jackknife; from memory).
    """
    f = np.asarray(freqs, dtype=float)
    s = np.asarray(psd, dtype=float)
    keep = np.isfinite(s) & (s > 0) & (f >= band[0]) & (f <= band[1]) & (f > 0)
    n = int(keep.sum())
    if n < MIN_POINTS:
        return _nan_fit(tuple(map(float, band)), n,
                        f"only {n} usable points in the band: too few for a power law")
    lf, ls = np.log(f[keep]), np.log(s[keep])
    w = 1.0 / f[keep]  # equal weight per unit of log f on a linear grid
    w = w / w.mean()
    k = float(n_segments)
    offset, var = float(special.digamma(k) - math.log(k)), float(special.polygamma(1, k))
    theta = _line(lf, ls - offset, w)
    resid = ls - offset - (theta[0] - theta[1] * lf)
    chi2_dof = float(resid @ resid / var / (n - 2))
    used = (float(f[keep][0]), float(f[keep][-1]))
    if batches is not None and np.shape(batches)[0] >= 2:
        b_arr = np.asarray(batches, dtype=float)[:, keep]
        b = b_arr.shape[0]
        kb = k * (b - 1) / b
        off_b = float(special.digamma(kb) - math.log(kb))
        total = b_arr.sum(axis=0)
        reps = []
        for i in range(b):
            rest = (total - b_arr[i]) / (b - 1)
            ok = rest > 0
            reps.append(_line(lf[ok], np.log(rest[ok]) - off_b, w[ok]))
        reps = np.array(reps)
        cov_diag = (b - 1) / b * np.sum((reps - reps.mean(axis=0)) ** 2, axis=0)
        errors = f"jackknife over {b} groups"
    else:
        # weighted least squares with equal known variances: the sandwich
        # var (X^T W X)^-1 X^T W^2 X (X^T W X)^-1
        X = np.stack([np.ones_like(lf), -lf], axis=1)
        bread = np.linalg.inv(X.T @ (X * w[:, None]))
        cov_diag = np.diag(var * bread @ (X.T @ (X * (w**2)[:, None])) @ bread)
        errors = "interval degrees of freedom"
    K = math.exp(theta[0])
    return PowerLawFit(K=K, K_err=K * math.sqrt(cov_diag[0]), alpha=float(theta[1]),
                       alpha_err=math.sqrt(cov_diag[1]), band=used, n_points=n,
                       chi2_dof=chi2_dof, errors=errors)


def corner_frequency(K: float, alpha: float, level: float) -> float:
    """Frequency where K / f^alpha meets a flat level: ``(K / level)^(1/alpha)`` [Hz].

    Parameters
    ----------
    K : float  Coefficient (value at 1 Hz) [unit^2/Hz]
    alpha : float  Exponent > 0 [1]
    level : float  Plateau or white level [unit^2/Hz]

    Returns
    -------
    float  NaN when an input is not finite or not positive.
    """
    if not (math.isfinite(K) and math.isfinite(alpha) and math.isfinite(level)
            and K > 0 and alpha > 0 and level > 0):
        return float("nan")
    return float((K / level) ** (1.0 / alpha))


def usable_band(band: tuple[float, float] | None, freqs: np.ndarray, *,
                symmetric: bool = False) -> tuple[float, float] | None:
    """A band cut to the frequencies a run resolves without bias: above the two lowest
    periodogram frequencies (window leakage) and below a fifth of the sampling rate
    (aliasing, bin averaging) [Hz]; None when nothing is left or no band is given.

    With ``symmetric`` the cut band is narrowed further to stay centred (in log f) on the
    given one: a sum of log-uniformly spread Lorentzians is symmetric in log f about the
    centre of its spread, so a centred band keeps the bends at its two ends balanced.
    """
    if band is None:
        return None
    f = np.asarray(freqs, dtype=float)
    lo = max(float(band[0]), float(f[min(2, f.size - 1)]))
    hi = min(float(band[1]), 0.4 * float(f[-1]))
    if symmetric and hi > lo:
        centre = math.sqrt(float(band[0]) * float(band[1]))
        half = min(math.log(centre / lo), math.log(hi / centre))
        lo, hi = centre * math.exp(-half), centre * math.exp(half)
    return (lo, hi) if hi > lo else None


def fit_band(user_band: tuple[float, float] | None, spread_band: tuple[float, float] | None,
             freqs: np.ndarray) -> tuple[float, float] | None:
    """The band of the 1/f fit: the user's where given, else the inner band of the trap
    levels' spread, centred; either cut to what the run resolves (:func:`usable_band`) [Hz]."""
    if user_band is not None:
        return usable_band(user_band, freqs)
    return usable_band(spread_band, freqs, symmetric=True)


def flicker_variables(freqs: np.ndarray, psd: np.ndarray, n_segments: float,
                      band: tuple[float, float], *, groups: np.ndarray | None = None,
                      plateaus: np.ndarray | None = None,
                      current_psd: np.ndarray | None = None,
                      current_groups: np.ndarray | None = None,
                      current_level: float = float("nan")) -> dict:
    """The run file's 1/f variables: K, alpha and their errors per species and for the
    current, and the corner where the line meets a flat level.

    Parameters
    ----------
    freqs : array (F,)  [Hz]
    psd : array (S, F)  Averaged count periodograms [counts^2/Hz]
    n_segments : float  k per frequency [1]
    band : (float, float)  The fit band [Hz]
    groups : array (B, S, F), optional  Jackknife groups of ``psd``
    plateaus : array (S,), optional  A flat level per species (e.g. the plateau of a resolved
        faster Lorentzian; NaN where none) [counts^2/Hz]
    current_psd : array (F,), optional  The current's G-R part [A^2/Hz]
    current_groups : array (B, F), optional  Its jackknife groups
    current_level : float  The current's flat level (white shot level or a plateau) [A^2/Hz]

    Returns
    -------
    dict  name -> (dims, values), the names registered in :mod:`grmc.dataset`.
    """
    fits = [fit_power_law(freqs, psd[s], n_segments, band=band,
                          batches=None if groups is None else groups[:, s])
            for s in range(psd.shape[0])]
    levels = np.full(len(fits), np.nan) if plateaus is None else np.asarray(plateaus)
    sp = ("species",)
    out = {
        "flicker_coefficient": (sp, np.array([f.K for f in fits])),
        "flicker_coefficient_stderr": (sp, np.array([f.K_err for f in fits])),
        "flicker_exponent": (sp, np.array([f.alpha for f in fits])),
        "flicker_exponent_stderr": (sp, np.array([f.alpha_err for f in fits])),
        "flicker_corner_frequency": (sp, np.array([corner_frequency(f.K, f.alpha, lv)
                                                   for f, lv in zip(fits, levels)])),
    }
    if current_psd is not None:
        c = fit_power_law(freqs, current_psd, n_segments, band=band, batches=current_groups)
        out.update({
            "current_flicker_coefficient": ((), c.K),
            "current_flicker_coefficient_stderr": ((), c.K_err),
            "current_flicker_exponent": ((), c.alpha),
            "current_flicker_exponent_stderr": ((), c.alpha_err),
            "current_flicker_corner_frequency": ((), corner_frequency(c.K, c.alpha,
                                                                      current_level)),
        })
    return out
