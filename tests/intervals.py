"""Shared check of a current spectrum against a reference (not a test module).

At the m frequencies from the lowest resolved one to a fifth of the sampling rate, the number
of references outside the 95 % chi-squared intervals (Welch, IEEE Trans. Audio Electroacoust.
15, 70, 1967) is Binomial(m, 0.05) when the estimate is unbiased; the check allows 4 of its
standard deviations, sqrt(m 0.05 0.95).
"""

from __future__ import annotations

import math

import numpy as np


def current_outside(ds, reference) -> tuple[int, int, float]:
    """(references outside the intervals, m, allowed distance from m 0.05).

    ``reference`` is a function of the frequencies [Hz] or an array on the file's frequency
    grid [A^2/Hz].
    """
    f = ds["frequency"].values
    fs = ds.attrs["samples"] / ds.attrs["duration_s"]
    sel = f <= fs / 5
    ref = reference(f[sel]) if callable(reference) else np.asarray(reference)[sel]
    lo, hi = ds["current_psd_low"].values[sel], ds["current_psd_high"].values[sel]
    out = int(np.sum((ref < lo) | (ref > hi)))
    m = int(sel.sum())
    return out, m, 4 * math.sqrt(m * 0.05 * 0.95)
