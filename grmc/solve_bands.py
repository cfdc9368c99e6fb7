"""Band-averaged spectra of a spectrum without sampling error (exact or linear noise).

A Monte Carlo file averages its periodogram over 10 bands per decade (:mod:`grmc.bands`)
and gives each band a chi-squared interval.  The exact and linear-noise answers are curves
evaluated on a logarithmic grid; their band average is the integral of the curve over the
band (trapezoid rule on the piecewise-linear interpolant, :func:`grmc.bandnoise.band_weights`)
divided by the band's width, on the same bands, so files of every method line up.  There is
no sampling interval: ``_low`` and ``_high`` equal the value (the variables say so in their
``comment`` attribute).
"""

from __future__ import annotations

import numpy as np

from .bandnoise import band_weights
from .bands import BANDS_PER_DECADE

__all__ = ["EXACT_BAND_NOTE", "add_band_spectra", "band_edges", "band_mean", "band_spectra_of"]

#: The ``comment`` of every ``_low`` / ``_high`` band variable of an exact or linear-noise file.
EXACT_BAND_NOTE = ("no sampling interval: the spectrum is computed, not estimated, so low = "
                   "high = the band average")


def band_edges(freqs: np.ndarray) -> np.ndarray:
    """Bands of 10 per decade lying wholly inside ``[freqs[0], freqs[-1]]``.

    Parameters
    ----------
    freqs : ndarray (F,)  Ascending frequencies [Hz]

    Returns
    -------
    ndarray (B, 2)  Lower and upper edges of each band [Hz]
    """
    f = np.asarray(freqs, dtype=float)
    first = int(np.ceil(np.log10(f[0]) * BANDS_PER_DECADE - 1e-9))
    last = int(np.floor(np.log10(f[-1]) * BANDS_PER_DECADE + 1e-9)) - 1
    k = np.arange(first, last + 1)
    return np.stack([10.0 ** (k / BANDS_PER_DECADE), 10.0 ** ((k + 1) / BANDS_PER_DECADE)],
                    axis=-1).reshape(-1, 2)


def band_mean(freqs: np.ndarray, psd: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Average of a spectrum over each band [unit^2/Hz].

    Parameters
    ----------
    freqs : ndarray (F,)  Ascending frequencies [Hz]
    psd : ndarray (..., F)  The spectrum at ``freqs`` [unit^2/Hz]
    edges : ndarray (B, 2)  Band edges inside the frequencies [Hz]

    Returns
    -------
    ndarray (..., B)
    """
    w = np.stack([band_weights(freqs, (a, b)) / (b - a) for a, b in edges], axis=-1)
    return np.asarray(psd, dtype=float) @ w


def band_spectra_of(freqs: np.ndarray, psd: np.ndarray, psd_lna: np.ndarray,
                    current_psd: np.ndarray | None = None,
                    current_psd_lna: np.ndarray | None = None) -> tuple[dict, dict]:
    """The band variables of an exact or linear-noise file.

    Parameters
    ----------
    freqs : ndarray (F,)  [Hz]
    psd, psd_lna : ndarray (S, F)  Count spectra [1/Hz]
    current_psd, current_psd_lna : ndarray (F,), optional  Current spectra [A^2/Hz]

    Returns
    -------
    data : dict  ``psd_band``, ``psd_band_low``, ``psd_band_high``, ``psd_band_lna`` and,
        with a current, the ``current_psd_band*`` variables (xarray tuples)
    coords : dict  ``frequency_band``: the geometric band centres [Hz]
    """
    edges = band_edges(freqs)
    centres = np.sqrt(edges[:, 0] * edges[:, 1])
    dims = ("species", "frequency_band")
    p = band_mean(freqs, psd, edges)
    data = {"psd_band": (dims, p), "psd_band_low": (dims, p.copy()),
            "psd_band_high": (dims, p.copy()),
            "psd_band_lna": (dims, band_mean(freqs, psd_lna, edges))}
    if current_psd is not None:
        c = band_mean(freqs, current_psd, edges)
        lna = current_psd if current_psd_lna is None else current_psd_lna
        data.update({"current_psd_band": (("frequency_band",), c),
                     "current_psd_band_low": (("frequency_band",), c.copy()),
                     "current_psd_band_high": (("frequency_band",), c.copy()),
                     "current_psd_band_lna": (("frequency_band",),
                                              band_mean(freqs, lna, edges))})
    return data, {"frequency_band": ("frequency_band", centres)}


def add_band_spectra(ds):
    """``ds`` with the band variables of its ``psd`` (and ``current_psd``) added, the
    ``_low`` / ``_high`` ones marked with :data:`EXACT_BAND_NOTE`; units and long names from
    the registry (:func:`grmc.dataset.finish` is applied again by the caller or here)."""
    from .dataset import COORDINATES, FILL_VALUE, VARIABLES

    freqs = ds["frequency"].values
    cur = ds["current_psd"].values if "current_psd" in ds else None
    cur_lna = ds["current_psd_lna"].values if "current_psd_lna" in ds else None
    data, coords = band_spectra_of(freqs, ds["psd"].values, ds["psd_lna"].values, cur, cur_lna)
    ds = ds.assign_coords({k: v for k, v in coords.items()}).assign(data)
    for name in list(data) + list(coords):
        spec = VARIABLES.get(name) or COORDINATES.get(name)
        if spec is not None:
            ds[name].attrs.update(units=spec.units, long_name=spec.long_name)
        if name in data:
            ds[name].encoding["_FillValue"] = FILL_VALUE
        if name.endswith(("_low", "_high")):
            ds[name].attrs["comment"] = EXACT_BAND_NOTE
    ds["frequency_band"].encoding["_FillValue"] = None
    return ds
