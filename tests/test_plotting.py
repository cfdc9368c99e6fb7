"""Tests of grmc.plotting: every figure is written as a valid PNG of sensible size.

The synthetic Dataset is built like a real file: the registry's names and units
(grmc.dataset.finish), the species and channel names of a real model, and Lorentzian
spectra (van Vliet, Proc. IRE 46, 1004, 1958, from memory) with Welch chi-squared intervals
(IEEE Trans. Audio Electroacoust. 15, 70, 1967), a transient relaxing exponentially toward the steady state
(low-injection decay, common practice), Poisson/binomial count histograms.
"""

from __future__ import annotations

import struct
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from grmc import plotting, spectra
from grmc.dataset import finish
from grmc.model import build_model
from grmc.scenario import load_scenario

K = 16
SCENARIO = """
title = "box with three deep traps"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
auger_electron_cm6_s = 1.0e-30
donors_cm3 = 1.0e17
[volume]
volume_cm3 = 1.0e-15
[[traps]]
label = "deep"
count = 3
energy_eV = 0.1
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
"""
MODEL = build_model(load_scenario(text=SCENARIO))
SPECIES = list(MODEL.species)
CHANNELS = list(MODEL.channel_names)


def make_dataset(seed: int = 0) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    t = np.arange(512) * 2e-6 / 512
    f = np.arange(1, 1025) / 2e-5  # T_seg = 20 us
    tau = np.array([1.5e-7, 1.5e-7, 4e-7])
    var = np.array([30.0, 30.0, 0.7])
    lna = spectra.lorentzian(f[None, :], var[:, None], tau[:, None])
    psd = lna * rng.chisquare(2 * K, lna.shape) / (2 * K)
    low, high = spectra.welch_interval(psd, K)
    steady = np.array([40.0, 40.0, 1.6])
    start = np.array([90.0, 90.0, 2.5])
    relax = steady[:, None] + (start - steady)[:, None] * np.exp(-t[None, :] / 3e-7)
    n_traj = 64
    cvar = var[:, None] * (1 + 0.5 * np.exp(-t[None, :] / 3e-7))
    cmean = relax + rng.normal(size=relax.shape) * np.sqrt(cvar / n_traj)
    values = np.arange(0, 91)
    hist = np.stack([stats.poisson.pmf(values, 40.0), stats.poisson.pmf(values, 40.0),
                     stats.binom.pmf(values, 3, 1.6 / 3)])
    hist_mc = hist * rng.chisquare(200, hist.shape) / 200
    rates = np.geomspace(3e5, 2e8, len(CHANNELS))
    rates[-1] = 0.0  # a channel that never fired
    a = 1.6e-14
    ds = xr.Dataset(
        {
            "count_mean": (("species", "t"), cmean),
            "count_var": (("species", "t"), cvar),
            "count_continuum": (("species", "t"), relax),
            "psd": (("species", "frequency"), psd),
            "psd_low": (("species", "frequency"), low),
            "psd_high": (("species", "frequency"), high),
            "psd_lna": (("species", "frequency"), lna),
            "current_psd": ("frequency", a**2 * psd[0]),
            "current_psd_lna": ("frequency", a**2 * lna[0]),
            "current_mean": ((), a * 40.0),
            "event_rate": ("channel", rates),
            "count_histogram": (("species", "count_value"), hist_mc),
            "count_histogram_exact": (("species", "count_value"), hist),
        },
        coords={"t": ("t", t), "frequency": ("frequency", f),
                "species": SPECIES, "channel": CHANNELS, "count_value": values},
    )
    return finish(ds, title="box with three deep traps", scenario_toml=SCENARIO,
                  command="test", trajectories=n_traj)


def png_size(path) -> tuple[int, int]:
    """Width and height from the PNG signature and IHDR chunk (PNG specification, W3C)."""
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    assert head[12:16] == b"IHDR"
    return struct.unpack(">II", head[16:24])


def test_plot_all_writes_pngs(tmp_path):
    nc = tmp_path / "run.nc"
    make_dataset().to_netcdf(nc)
    paths = plotting.plot_all(nc, tmp_path / "fig")
    names = sorted(p.name for p in paths)
    assert names == ["run_current_psd.png", "run_histogram.png", "run_psd.png",
                     "run_rates.png", "run_transient.png"]
    for p in paths:
        assert p.exists() and p.stat().st_size > 20_000
        w, h = png_size(p)
        assert 600 <= w <= 3000 and 300 <= h <= 3000, (p.name, w, h)
    assert not list((tmp_path / "fig").glob(".*tmp"))


def test_tolerates_missing_variables(tmp_path):
    ds = make_dataset()
    ds = ds.drop_vars(["count_histogram", "count_histogram_exact", "current_psd",
                       "current_psd_lna", "current_mean", "psd_lna", "event_rate",
                       "count_continuum"])
    ds = xr.concat([ds, ds], dim="sweep")  # a sweep file: drawn at its first point
    nc = tmp_path / "bare.nc"
    ds.to_netcdf(nc)
    names = sorted(p.name for p in plotting.plot_all(nc, tmp_path))
    assert names == ["bare_psd.png", "bare_transient.png"]


def test_functions_take_and_return_ax():
    from matplotlib.figure import Figure

    ds = make_dataset()
    fig = Figure()
    axes = fig.subplots(2, 3)
    assert plotting.plot_psd(ds, "electrons", ax=axes[0, 0]) is axes[0, 0]
    assert plotting.plot_psd(ds, "current", ax=axes[0, 1]) is axes[0, 1]
    assert plotting.plot_transient(ds, ax=axes[0, 2]) is axes[0, 2]
    assert plotting.plot_histogram(ds, "trapped:deep", ax=axes[1, 0]) is axes[1, 0]
    assert plotting.plot_event_rates(ds, ax=axes[1, 1]) is axes[1, 1]
    # without a histogram: an explanation instead of a plot
    ax = plotting.plot_histogram(ds.drop_vars("count_histogram"), "electrons", ax=axes[1, 2])
    assert "no count_histogram" in ax.texts[0].get_text()
    # the corner of the electrons' Lorentzian is marked (fitted here: no corner variable)
    lines = [ln for ln in axes[0, 0].get_lines() if ln.get_label() == "corner frequency"]
    assert len(lines) == 1
    f_c = lines[0].get_xdata()[0]
    assert f_c == pytest.approx(1 / (2 * np.pi * 1.5e-7), rel=0.1)
    # a corner stored in the file is used as it is
    ds["corner_frequency"] = (("species", "component"), [[1e6], [2e6], [3e6]], {"units": "Hz"})
    ax = plotting.plot_psd(ds, "holes")
    lines = [ln for ln in ax.get_lines() if ln.get_label() == "corner frequency"]
    assert lines[0].get_xdata()[0] == 2e6


def test_import_is_lazy():
    # DEVELOPERS.md: importing the module imports neither matplotlib nor xarray
    code = ("import sys, grmc.plotting, grmc.export, grmc.spectra; "
            "print('matplotlib' in sys.modules, 'xarray' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.split() == ["False", "False"]


def test_long_titles_fit_their_panels():
    """A long scenario title is shortened to one line and the panel's own line wrapped, so
    that no title line is wider than its panel (measured on the drawn figure's text
    extents)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    ds = make_dataset()
    ds.attrs["title"] = "an array of cooled pixels under chopped light with " * 4
    fig, axes = plotting._grid(4)
    for ax in axes:
        plotting.plot_psd(ds, "trapped:deep", ax=ax)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    for ax in axes:
        title = ax.title
        assert "..." in title.get_text()
        assert title.get_window_extent(renderer).width <= ax.get_window_extent(renderer).width
