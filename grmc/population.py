"""Pixel populations: each trajectory is one pixel of an array.

With ``dopants = "poisson"`` every pixel draws its own dopant and trap counts, so the spread of
the pixels' mean readout and noise is the device-to-device spread a designer must plan for
("what fraction of my pixels is noisier than my read noise?").  Per pixel, the periodogram of
the readout quantity (the current with a ``[readout]``, else the electron count) is averaged
over logarithmic bands of :data:`BANDS_PER_DECADE` per decade, which keeps 2 m degrees of
freedom per band of m periodogram bins (Welch, IEEE Trans. Audio Electroacoust. 15, 70,
1967); a pixel's noise at a chosen frequency is read from its banded spectrum (interpolation
linear in the values between band centres in log f, which keeps it unbiased).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["BANDS_PER_DECADE", "PixelBands", "own_theory", "pixel_bands", "single_trap_share",
           "threshold_fraction", "worst_pixels"]

BANDS_PER_DECADE = 6


@dataclass(frozen=True)
class PixelBands:
    """Logarithmic bands over the periodogram's frequency grid.

    Attributes
    ----------
    index : ndarray (n_freq,)  Band of each periodogram frequency
    centres : ndarray (n_bands,)  Geometric centre of each band's frequencies [Hz]
    counts : ndarray (n_bands,)  Periodogram bins in each band
    """

    index: np.ndarray
    centres: np.ndarray
    counts: np.ndarray

    def average(self, psd: np.ndarray) -> np.ndarray:
        """Band averages of one periodogram (n_freq,) -> (n_bands,)."""
        return np.bincount(self.index, weights=psd, minlength=self.counts.size) / self.counts

    def at(self, banded: np.ndarray, freqs: np.ndarray) -> np.ndarray:
        """Banded spectra (..., n_bands) at frequencies [Hz]: interpolation linear in the
        values and in log f, so that it is unbiased (a linear operation commutes with the
        expectation; a log-log interpolation of noisy values would not)."""
        lf, lc = np.log(np.asarray(freqs, dtype=float)), np.log(self.centres)
        flat = np.reshape(banded, (-1, self.centres.size))
        out = np.array([np.interp(lf, lc, row) for row in flat])
        return out.reshape(np.shape(banded)[:-1] + (len(lf),))


def pixel_bands(freqs: np.ndarray) -> PixelBands:
    """Bands of :data:`BANDS_PER_DECADE` per decade covering ``freqs`` (empty bands merged)."""
    f = np.asarray(freqs, dtype=float)
    raw = np.floor(np.log10(f / f[0]) * BANDS_PER_DECADE + 1e-9).astype(np.int64)
    _, index = np.unique(raw, return_inverse=True)
    counts = np.bincount(index)
    centres = np.exp(np.bincount(index, weights=np.log(f)) / counts)
    return PixelBands(index=index, centres=centres, counts=counts)


def threshold_fraction(noise: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray]:
    """Fraction of pixels whose noise exceeds ``threshold`` and its binomial standard error.

    Parameters
    ----------
    noise : ndarray (pixels, frequencies)  [unit^2/Hz]
    threshold : float  [unit^2/Hz]

    Returns
    -------
    fraction, stderr : ndarray (frequencies,)  sqrt(p (1 - p) / n) (common practice)
    """
    above = np.asarray(noise) > threshold
    p = above.mean(axis=0)
    return p, np.sqrt(p * (1.0 - p) / max(above.shape[0], 1))


def worst_pixels(noise_at_first: np.ndarray, n: int = 5) -> np.ndarray:
    """Indices of the ``n`` noisiest pixels at the first chosen frequency, noisiest first."""
    order = np.argsort(noise_at_first, kind="stable")[::-1]
    return order[:min(n, len(order))]


def single_trap_share(model, freqs: np.ndarray, *, readout=None) -> float:
    """Largest share of the readout noise that one single trap adds, at each frequency.

    For every trap level (or sub-level of a level with a spread of time constants, whose
    traps each have a time constant of their own) holding exactly one trap, the linear-noise
    spectrum of the readout
    quantity (the current with a ``readout``, else the electron count) is compared with that
    of the same pixel without this trap: ``share = 1 - S_without / S_with``.  A pixel whose
    share exceeds one half is one whose spectrum a single trap dominates (telegraph-like:
    one trap switching between filled and empty; Machlup, J. Appl. Phys. 25, 341, 1954).  For
    one trap the two-state chain is linear in its occupancy, so the linear-noise spectrum of
    the trap itself is exact.

    Parameters
    ----------
    model : Model  One pixel's model (its own trap counts)
    freqs : ndarray  Frequencies [Hz]
    readout : Readout, optional

    Returns
    -------
    ndarray (len(freqs),)  The largest share over single-trap levels (0 where there is none)
    """
    from . import continuum
    from .model import build_model
    from .readout import lna_current

    def readout_spectrum(m) -> np.ndarray:
        smat = continuum.lna_psd(m, freqs)
        if readout is not None:
            return lna_current(m, freqs, smat=smat).psd
        return np.real(smat[0, 0])

    share = np.zeros(len(freqs))
    # a trap level, or a sub-level of a level with spread time constants, holding one trap
    singles = [k for k, t in enumerate(model.level_counts) if t == 1]
    if not singles:
        return share
    full = readout_spectrum(model)
    for k in singles:
        without = readout_spectrum(build_model(model.scenario,
                                               counts=model.counts_without_trap(k)))
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.maximum(share, np.clip(1.0 - without / full, 0.0, 1.0))
    return share


def own_theory(rows, model_of, freqs: np.ndarray, *, readout=None) -> dict:
    """Each pixel beside its own theory, like with like (``dopants = "poisson"``).

    A pooled variance across pixels holds the spread of the pixels' means as well and cannot
    be compared with the linear-noise variance of the nominal pixel.  Here every pixel's own
    time variance is set beside the linear-noise variance of its own model (its own dopant and
    trap counts; van Kampen, Stochastic Processes in Physics and Chemistry, ch. X), and the
    linear-noise spectra of the pixels are averaged: the theory line of the pooled spectrum.

    Parameters
    ----------
    rows : list of tuples  Per trajectory, in order: (index, time-mean [count],
        time-mean of squares [count^2], ..., counts) as the run reduces them
    model_of : callable  Counts -> Model of that pixel
    freqs : ndarray  Frequencies of the spectra [Hz]
    readout : Readout, optional  With a readout the current's spectrum is averaged too

    Returns
    -------
    dict  Output variables ``pixel_var``, ``pixel_var_lna``, ``pixel_steady_continuum``
        (realization, species), ``psd_lna_pixels`` (species, frequency) and, with a readout,
        ``current_psd_lna_pixels`` (frequency)
    """
    from . import continuum
    from .readout import lna_current

    theory: dict = {}
    for row in rows:
        counts = row[4]
        if counts in theory:
            continue
        m = model_of(counts)
        ss = continuum.steady_state(m)
        smat = continuum.lna_psd(m, freqs)
        cur = lna_current(m, freqs, smat=smat, x=ss).psd if readout is not None else None
        # on the file's species (a spread level's total beside its sub-levels)
        theory[counts] = (m.project(ss), np.diag(m.project_matrix(continuum.lna(m).covariance)),
                          np.real(np.einsum("iif->if", m.project_matrix(smat))), cur)
    own = [theory[row[4]] for row in rows]
    means = np.array([row[1] for row in rows])
    var = np.maximum(np.array([row[2] for row in rows]) - means**2, 0.0)
    dims = ("realization", "species")
    out = {
        "pixel_var": (dims, var),
        "pixel_var_lna": (dims, np.array([t[1] for t in own])),
        "pixel_steady_continuum": (dims, np.array([t[0] for t in own])),
        "psd_lna_pixels": (("species", "frequency"), np.mean([t[2] for t in own], axis=0)),
    }
    if readout is not None:
        out["current_psd_lna_pixels"] = (("frequency",), np.mean([t[3] for t in own], axis=0))
    return out
