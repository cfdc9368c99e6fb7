"""Spread trap levels in the staged run: rounds that merge exactly, band-averaged spectra of
the level's total, and the theory of the total in every file kind.

The scenario helpers and the sub-level Lorentzians come from tests/test_flicker.py; the
coverage rule (at least 85 % of the bands covered, fewer misses than the 99.9 % point of
binomial(B, 0.05)) from tests/test_accuracy.py.  Seeds are fixed.
"""

from __future__ import annotations

import numpy as np
import xarray as xr
from test_accuracy import _misses_allowed
from test_flicker import layer, sublevel_lorentzians

import grmc
from grmc.bands import band_average
from grmc.model import build_model


def _small(run: str, traps: str = "density_cm3 = 6.0e15") -> grmc.Scenario:
    """A 1e-14 cm^3 layer (about 1000 electrons; by default about 60 traps) whose level is
    spread over two decades (four sub-levels), with a readout."""
    return grmc.load_scenario(text=layer(volume=1.0e-14, decades=2.0, run=run, traps=traps))


def test_rounds_with_sublevels_give_the_file_of_a_fixed_run():
    """Each trajectory is projected onto the output species before any accumulator sees it,
    so a run in rounds holds the same data as a fixed run of the final count (and another
    number of workers), sub-levels and the level's total included (exact equality)."""
    scen = _small("trajectories = 16\nseed = 3\nduration_s = 1.0e-4\nsamples = 512")
    ada = grmc.run(scen, accuracy=0.12, band_Hz=(1.0e5, 1.0e6), workers=2, progress=False)
    assert ada.attrs["rounds"] >= 2  # more than one round merged
    assert "trapped:ox#0" in list(ada["species"].values)
    n = int(ada.attrs["trajectories"])
    fixed = grmc.run(_small(f"trajectories = {n}\nseed = 3\nduration_s = "
                            f"{ada.attrs['duration_s']!r}\nsamples = {ada.attrs['samples']}\n"
                            f"settle_s = {ada.attrs['settle_s']!r}"), workers=1, progress=False)
    xr.testing.assert_identical(ada.drop_attrs(deep=False)[list(fixed.data_vars)],
                                fixed.drop_attrs(deep=False)[list(fixed.data_vars)])


def test_band_averaged_total_covers_the_sum_of_sublevel_lorentzians():
    """The band-averaged spectrum of the level's total against McWhorter's superposition of
    the sub-levels' Machlup Lorentzians (McWhorter 1957; Machlup, J. Appl. Phys. 25, 341,
    1954) averaged over the same Fourier frequencies.  Eight traps (two per sub-level) beside
    ~1000 free electrons: the linear-noise band average equals that sum to their coupling
    through the free electrons, tolerance 10 T / N_e as in tests/test_flicker.py; the Monte
    Carlo bands' 95 % chi-squared intervals (2 K m degrees of freedom, Welch 1967) cover it
    with the binomial rule above."""
    n_traps = 8
    scen = _small("trajectories = 64\nseed = 8\nduration_s = 1.0e-4\nsamples = 512",
                  traps=f"count = {n_traps}")
    ds = grmc.run(scen, workers=2, progress=False)
    model = build_model(scen)
    ss = np.asarray(ds["steady_continuum"].sel(species=["electrons", "holes"]).values)
    f = ds["frequency"].values
    truth = band_average(f, sublevel_lorentzians(model, ss, f)).mean
    tot = ds.sel(species="trapped:ox")
    ok = np.isfinite(tot["psd_band_lna"].values)
    np.testing.assert_allclose(tot["psd_band_lna"].values[ok], truth[ok],
                               rtol=10.0 * n_traps / float(ss[0]))
    # bands well inside the resolved range: above the two lowest periodogram frequencies and
    # below a fifth of the sampling rate (window leakage, bin averaging)
    centres = ds["frequency_band"].values
    inside = (centres > 3.0 * f[0]) & (centres < 0.2 * f[-1]) & ok
    lo, hi = tot["psd_band_low"].values[inside], tot["psd_band_high"].values[inside]
    t = truth[inside]
    misses = int(np.sum((t < lo) | (t > hi)))
    assert t.size >= 8 and misses <= _misses_allowed(t.size), (misses, t.size)


def test_exact_file_holds_the_theory_of_the_total():
    """``grmc exact`` gets the level's total from the one theory function: its linear-noise
    spectrum is the sum of the sub-levels' Lorentzians (as above: three traps beside ~100
    free electrons, tolerance 10 T / N_e) and its continuum mean the sum of the sub-levels'
    means (the projection is a sum, common practice)."""
    from grmc.exact_output import exact_dataset

    text = layer(volume=1.0e-15, decades=6.0, traps="count = 3",
                 run="duration_s = 1.0e-2\nsamples = 256", readout=False)
    scen = grmc.load_scenario(text=text)
    ds = exact_dataset(scen)
    model = build_model(scen)
    species = list(ds["species"].values)
    subs = [s for s in species if s.startswith("trapped:ox#")]
    steady = ds["steady_continuum"]
    np.testing.assert_allclose(float(steady.sel(species="trapped:ox")),
                               float(steady.sel(species=subs).sum()), rtol=1e-12)
    ss = np.asarray(steady.sel(species=["electrons", "holes"]).values)
    f = ds["frequency"].values
    np.testing.assert_allclose(ds["psd_lna"].sel(species="trapped:ox").values,
                               sublevel_lorentzians(model, ss, f), rtol=10.0 * 3 / float(ss[0]))
