"""Pixel populations: per-pixel noise estimates, threshold fractions, worst pixels."""

from __future__ import annotations

import math

import numpy as np
from birth_death import birth_death_box

import grmc
from grmc import population, spectra

BD = birth_death_box(title="identical pixels: birth-death electrons", more="""
[population]
frequencies_Hz = [300.0, 3000.0]
threshold = 1.0e-3
[run]
trajectories = 96
duration_s = 1.0e-2
samples = 1024
settle_s = 5.0e-4
seed = 41
""")


def test_bands_average_and_interpolate():
    f = np.arange(1, 1001) * 10.0
    bands = population.pixel_bands(f)
    assert bands.counts.sum() == f.size and np.all(bands.counts > 0)
    flat = bands.average(np.full(f.size, 3.0))
    np.testing.assert_allclose(flat, 3.0)
    np.testing.assert_allclose(bands.at(flat, [20.0, 5000.0]), 3.0)
    assert np.all(np.diff(bands.centres) > 0)


def test_pixel_noise_is_unbiased_and_fraction_consistent():
    """Identical pixels (rounded dopants): the mean over pixels of each pixel's noise at a
    chosen frequency equals the same band operation applied to the exact Lorentzian
    4 var tau / (1 + (2 pi f tau)^2) (van Vliet, Proc. IRE 46, 1004, 1958, from memory), within
    4 standard errors of the spread across pixels; the threshold fraction and the worst pixels
    are what the per-pixel values say."""
    ds = grmc.run(grmc.load_scenario(text=BD), workers=2, progress=False)
    noise = ds["pixel_count_noise"].values  # (pixels, 2)
    f_grid = ds["frequency"].values
    bands = population.pixel_bands(f_grid)
    n0 = float(ds["steady_continuum"].sel(species="electrons"))
    k = 1.0e-16 * float(ds["steady_continuum"].sel(species="holes")) / 1.0e-15
    exact = spectra.lorentzian(f_grid, n0, 1.0 / k)
    expected = bands.at(bands.average(exact), ds["noise_frequency"].values)
    n = noise.shape[0]
    se = noise.std(axis=0, ddof=1) / math.sqrt(n)
    assert np.all(np.abs(noise.mean(axis=0) - expected) < 4 * se), (noise.mean(axis=0), expected)
    frac = ds["fraction_above_threshold"].values
    np.testing.assert_array_equal(frac, (noise > 1.0e-3).mean(axis=0))
    worst = ds["worst_pixel"].values
    assert worst[0] == int(np.argmax(noise[:, 0]))
    assert np.all(np.diff(noise[worst, 0]) <= 0)


TELEGRAPH = """
title = "n-type pixels with on average one trap each"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e6
radiative_cm3_s = 1.0e-12
donors_cm3 = 1.0e17
[volume]
volume_cm3 = 1.0e-14
[[traps]]
label = "rts"
density_cm3 = 1.0e14
energy_eV = 0.3
kind = "acceptor"
electron_capture_cm3_s = 1.0e-9
hole_capture_cm3_s = 1.0e-9
[population]
frequencies_Hz = [1.0e3]
[run]
trajectories = 240
duration_s = 1.0e-4
samples = 256
seed = 43
dopants = "poisson"
"""


def test_telegraph_fraction_follows_the_poisson_law_of_single_traps():
    """In n-type pixels whose only electron-number noise comes from their traps, a pixel's
    noise is dominated by one trap exactly when it holds one trap, so the telegraph-like
    fraction equals the fraction of pixels with one trap, and that follows the Poisson law
    lambda exp(-lambda) of the mean count per pixel lambda = 1 (common practice for random
    dopant and defect counts), within 4 binomial standard errors."""
    ds = grmc.run(grmc.load_scenario(text=TELEGRAPH), workers=2, progress=False)
    counts = ds["trap_count"].values[:, 0]
    telegraph = ds["single_trap_share"].values[:, 0] > 0.5
    np.testing.assert_array_equal(telegraph, counts == 1)
    frac = float(ds["telegraph_fraction"].values[0])
    lam = 1.0e14 * 1.0e-14
    p = lam * math.exp(-lam)
    assert abs(frac - p) < 4 * math.sqrt(p * (1 - p) / counts.size)


def test_each_pixel_against_its_own_linear_noise():
    """dopants = "poisson": every pixel draws its own acceptor count A_i, so its electrons
    follow their own birth-death law, Poisson with mean and variance g / k_i, k_i ~ B A_i / V
    (common practice; the linear-noise variance is then exact to O(1/A)).  Each pixel's own
    linear-noise variance in the file is that of the model rebuilt from the pixel's own counts;
    each pixel's own time variance agrees with it on average within 4 standard errors of the
    spread across pixels; the file's theory spectrum is the average of the pixels' own."""
    from grmc import continuum
    from grmc.model import Counts, build_model
    from grmc.report import format_run_table

    scen = grmc.load_scenario(text=BD.replace("seed = 41", 'seed = 41\ndopants = "poisson"'))
    ds = grmc.run(scen, workers=2, progress=False)
    acceptors = ds["acceptors"].values
    assert np.unique(acceptors).size > 10  # the pixels really differ
    f0 = ds["frequency"].values[:1]
    e = list(ds["species"].values).index("electrons")
    own_psd = []
    for i in range(acceptors.size):
        model = build_model(scen, counts=Counts(donors=int(ds["donors"][i]),
                                                acceptors=int(acceptors[i]), traps=()))
        own = np.diag(continuum.lna(model).covariance)
        np.testing.assert_allclose(ds["pixel_var_lna"].values[i], own, rtol=1e-12)
        own_psd.append(np.real(continuum.lna_psd(model, f0)[e, e, 0]))
    np.testing.assert_allclose(ds["psd_lna_pixels"].values[e, 0], np.mean(own_psd), rtol=1e-10)
    d = ds["pixel_var"].values[:, e] - ds["pixel_var_lna"].values[:, e]
    se = d.std(ddof=1) / math.sqrt(d.size)
    assert abs(d.mean()) < 4 * se, (d.mean(), se)
    assert "against its own continuum mean and linear-noise variance" in format_run_table(ds)
