"""Band-averaged spectra with their intervals: 10 bands per decade on a fixed grid.

A periodogram has one value per Fourier frequency 1/T_seg apart, each with only two degrees
of freedom per segment; averaged over a band of m such values (and K segments) it has 2 K m
degrees of freedom, so the relative width of its interval falls as 1/sqrt(K m) and a band
at high frequency (many values) is precise long before one at low frequency (few).  The
bands are the same for every file: band k spans [10^(k/10), 10^((k+1)/10)) Hz and is
reported at its geometric centre 10^((k+1/2)/10) Hz, so bands of a Monte Carlo run, an exact
solution and the linear noise line up.  A band is kept when it lies inside the periodogram's
frequency range and holds at least one Fourier frequency.

The interval is chi-squared with the band's degrees of freedom, nu = 2 K m (Welch 1967):
the periodogram values of one segment at distinct Fourier frequencies are nearly
independent (rectangular window), those of distinct segments and trajectories independent.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .spectra import welch_interval

__all__ = ["BANDS_PER_DECADE", "BandSpectrum", "band_average", "band_index",
           "relative_half_width"]

#: Bands per decade of frequency.
BANDS_PER_DECADE = 10


@dataclass(frozen=True)
class BandSpectrum:
    """A spectrum averaged over bands.

    Attributes
    ----------
    centres : ndarray (B,)  Geometric band centres [Hz]
    edges : ndarray (B, 2)  Lower and upper band edges [Hz]
    counts : ndarray (B,)  Fourier frequencies in each band, m [1]
    mean : ndarray (..., B)  Band averages [unit^2/Hz]
    low, high : ndarray (..., B)  95 % interval (NaN without a segment count) [unit^2/Hz]
    """

    centres: np.ndarray
    edges: np.ndarray
    counts: np.ndarray
    mean: np.ndarray
    low: np.ndarray
    high: np.ndarray

    def inside(self, band_Hz: tuple[float, float]) -> np.ndarray:
        """Mask of the bands whose centre lies in [f1, f2]."""
        f1, f2 = band_Hz
        return (self.centres >= f1) & (self.centres <= f2)


def band_index(freqs: np.ndarray) -> np.ndarray:
    """Band number k of each frequency: 10^(k/10) <= f < 10^((k+1)/10) [1]."""
    f = np.asarray(freqs, dtype=float)
    return np.floor(np.log10(f) * BANDS_PER_DECADE + 1e-9).astype(np.int64)


def band_average(freqs: np.ndarray, psd: np.ndarray, segments: float | None = None, *,
                 level: float = 0.95) -> BandSpectrum:
    """Average a spectrum over the bands of 10 per decade, with its interval.

    Parameters
    ----------
    freqs : ndarray (F,)  Equally spaced Fourier frequencies, ascending [Hz]
    psd : ndarray (..., F)  Averaged periodogram, or any spectrum evaluated at ``freqs``
        (exact, linear noise) [unit^2/Hz]
    segments : float, optional  K, the periodogram segments averaged into ``psd`` over all
        trajectories; None for a spectrum without sampling error (the interval is then NaN)
        [1]
    level : float  Two-sided confidence level [1]

    Returns
    -------
    BandSpectrum

    Notes
    -----
    With m Fourier frequencies in a band, the band average S_b of K-segment averaged
    periodogram values has nu = 2 K m degrees of freedom, and nu S_b / <S_b> is close to
    chi^2_nu (Welch 1967), which gives

        <S_b> in [nu S_b / chi2.ppf(1 - a/2, nu),  nu S_b / chi2.ppf(a/2, nu)],  a = 1 - level.

    References
    ----------
    P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70 (1967).

    Examples
    --------
    >>> import numpy as np
    >>> f = np.arange(1, 1001) * 10.0
    >>> b = band_average(f, np.ones(1000), segments=16)
    >>> b.centres[:2].round(1), b.counts[:2]
    (array([11.2, 14.1]), array([1, 1]))
    """
    f = np.asarray(freqs, dtype=float)
    p = np.asarray(psd, dtype=float)
    k = band_index(f)
    df = f[1] - f[0] if f.size > 1 else f[0]
    first, last = k.min(), k.max()
    lo_edges = 10.0 ** (np.arange(first, last + 1) / BANDS_PER_DECADE)
    hi_edges = 10.0 ** (np.arange(first + 1, last + 2) / BANDS_PER_DECADE)
    counts = np.bincount(k - first, minlength=last - first + 1)
    # whole bands only: both edges within the covered range (half a bin at either end)
    keep = (counts > 0) & (lo_edges >= f[0] - 0.5 * df) & (hi_edges <= f[-1] + 0.5 * df)
    kept = np.flatnonzero(keep)
    flat = p.reshape(-1, f.size)
    sums = np.array([np.bincount(k - first, weights=row, minlength=counts.size)
                     for row in flat])
    mean = (sums[:, kept] / counts[kept]).reshape(p.shape[:-1] + (kept.size,))
    if segments is None:
        low = high = np.full_like(mean, np.nan)
    else:
        low, high = welch_interval(mean, float(segments) * counts[kept], level=level)
    centres = 10.0 ** ((np.arange(first, last + 1)[kept] + 0.5) / BANDS_PER_DECADE)
    edges = np.stack([lo_edges[kept], hi_edges[kept]], axis=-1)
    return BandSpectrum(centres, edges, counts[kept], mean, low, high)


def relative_half_width(mean: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Relative 95 % half-width (high - low) / (2 mean) [1] (inf where the mean is 0)."""
    mean = np.asarray(mean, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = (np.asarray(high) - np.asarray(low)) / (2.0 * np.abs(mean))
    return np.where(mean == 0, np.inf, out)
