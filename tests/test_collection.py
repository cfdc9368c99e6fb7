"""Collected current (`[readout] collection = "events"`): shot noise and photoconductive gain.

Tolerances: at m frequencies from the lowest resolved one to a fifth of the sampling rate, the
number of references outside the 95 % chi-squared intervals (Welch 1967) must lie within
m 0.05 +/- 4 sqrt(m 0.05 0.95) (binomial); single values within 4 standard errors; fixed
seeds.
"""

from __future__ import annotations

import math

import numpy as np
from birth_death import birth_death_box
from intervals import current_outside

import grmc
from grmc.model import ELEMENTARY_CHARGE_C as Q


def test_shot_noise_of_a_steady_population():
    """100 electrons held by donors, no generation-recombination: the collected current is a
    Poisson stream of rate N/t_tr, so its spectrum is white at 2 q I (Schottky, Ann. Phys. 57,
    541, 1918) and I = q N / t_tr."""
    text = """
title = "collection only"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e3
donors_cm3 = 1.0e17
[volume]
volume_cm3 = 1.0e-15
[readout]
bias_V = 0.1
length_cm = 1.0e-2
electron_mobility_cm2_Vs = 100.0
hole_mobility_cm2_Vs = 0.0
collection = "events"
[run]
trajectories = 32
duration_s = 1.0e-3
samples = 1024
seed = 31
"""
    ds = grmc.run(grmc.load_scenario(text=text), workers=2, progress=False)
    t_tr = 1.0e-2**2 / (100.0 * 0.1)  # L^2 / (mu bias) = 1e-5 s
    current = Q * 100 / t_tr
    # the mean current: Poisson count of collections over n * T, relative error 1/sqrt(count)
    count = current / Q * ds.attrs["trajectories"] * ds.attrs["duration_s"]
    assert abs(float(ds["current_mean"]) - current) < 4 * current / math.sqrt(count)
    out, m, width = current_outside(ds, lambda f: np.full_like(f, 2 * Q * current))
    assert abs(out - 0.05 * m) < width, (out, m)
    # the linear-noise line is the shot noise here
    np.testing.assert_allclose(ds["current_psd_lna"].values, 2 * Q * current, rtol=1e-9)


def test_photoconductive_gain():
    """Electrons made at rate g and lost at rate k (lifetime tau = 1/k), swept out and
    replaced at the contacts with transit time t_tr: S_I = 2 q I + 4 q G I / (1 + (2 pi f
    tau)^2) with gain G = tau / t_tr (photoconductor G-R noise: van Vliet, Proc. IRE 46,
    1004, 1958, from memory; shot noise: Schottky 1918)."""
    text = birth_death_box(title="photoconductor with collection events", more="""
[readout]
bias_V = 0.1
length_cm = 1.0e-2
electron_mobility_cm2_Vs = 100.0
hole_mobility_cm2_Vs = 0.0
collection = "events"
[run]
trajectories = 64
duration_s = 2.0e-2
samples = 4096
settle_s = 5.0e-4
seed = 32
""")
    ds = grmc.run(grmc.load_scenario(text=text), workers=2, progress=False)
    n0 = float(ds["steady_continuum"].sel(species="electrons"))  # g / k = 10 electrons
    tau = 1.0 / (1.0e-16 * float(ds["steady_continuum"].sel(species="holes")) / 1.0e-15)
    t_tr = 1.0e-5
    gain = tau / t_tr  # about 10
    current = Q * n0 / t_tr

    def reference(f):
        return 2 * Q * current + 4 * Q * gain * current / (1 + (2 * math.pi * f * tau) ** 2)

    out, m, width = current_outside(ds, reference)
    assert abs(out - 0.05 * m) < width, (out, m)
    # power: on the plateau (f < f_c / 2) the mean ratio estimate / reference is 1 within its
    # standard error 1/sqrt(K m) (each bin an average of K independent periodogram values, a
    # chi-squared_2K / 2K law); a gain off by 20 % moves it by about 15 %
    f = ds["frequency"].values
    plateau = f < 1.0 / (2 * math.pi * tau) / 2
    ratio = ds["current_psd"].values[plateau] / reference(f[plateau])
    k = ds.attrs["psd_segments"]
    assert plateau.sum() >= 10
    assert abs(ratio.mean() - 1.0) < 4.0 / math.sqrt(k * plateau.sum())
    # the linear-noise line is the same formula (var = mean for a birth-death count)
    np.testing.assert_allclose(ds["current_psd_lna"].values, reference(f), rtol=1e-3)
    assert gain > 5  # the G-R plateau is many times the shot noise: the test sees the gain
