"""Runs to an accuracy target: rounds that merge exactly, intervals that cover, a stop rule
that holds, a budget that stops cleanly, bad values refused.

Coverage checks compare the band-averaged Monte Carlo spectrum with an independent answer
averaged over the same Fourier frequencies: the exact master-equation spectrum (a small trap
level) and van Vliet's Lorentzian (a linear birth-death volume).  Each band's 95 % interval
misses the truth with probability about 5 %; with B bands the number of misses is at most
binomial(B, 0.05), and the tests require at least 85 % of bands covered and fewer misses
than the binomial law's 99.9 % point.  Seeds are fixed.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from birth_death import birth_death_box
from scipy import stats
from test_run import _cf_errors

import grmc
from grmc import exact
from grmc.accuracy import Z95
from grmc.bands import band_average, band_index, relative_half_width
from grmc.cli import main
from grmc.dataset import load
from grmc.model import build_model

#: Two-sided 95 % intervals miss with this probability (common practice).
MISS = 0.05


def _bd_text(run: str) -> str:
    return birth_death_box(title="birth-death to an accuracy", more=f"[run]\n{run}\n")


def trap_text(run: str) -> str:
    """An n-type box of about 30 electrons with two acceptor-like traps near midgap: a small
    trap level that the master equation solves exactly (the state space is small)."""
    return f"""
title = "two traps"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e12
radiative_cm3_s = 1.0e-10
donors_cm3 = 3.0e15
[volume]
volume_cm3 = 1.0e-14
[[traps]]
label = "deep"
count = 2
energy_eV = 0.05
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 3.0e-8
[light]
generation_cm3_s = 1.0e20
[run]
{run}
"""


def _misses_allowed(n_bands: int) -> int:
    """Misses allowed among n_bands intervals: at most 15 % of them and below the 99.9 %
    point of binomial(n_bands, 0.05) (scipy.stats.binom)."""
    return min(int(0.15 * n_bands), int(stats.binom.ppf(0.999, n_bands, MISS)))


def _check_stop_rule(ds: xr.Dataset) -> None:
    """Recompute the stop rule from the file: every species' stationary mean and variance,
    and every band of the count (and current) spectra inside the target band, within the
    target (relative 95 % half-width)."""
    target = float(ds.attrs["accuracy_target"])
    f1, f2 = ds.attrs["accuracy_band_Hz"]
    for name in ("stationary_mean", "stationary_var"):
        val, err = ds[name].values, ds[f"{name}_stderr"].values
        moving = (val != 0) | (err != 0)
        assert np.all(Z95 * err[moving] / np.abs(val[moving]) <= target), name
    inside = (ds["frequency_band"] >= f1) & (ds["frequency_band"] <= f2)
    assert int(inside.sum()) > 0
    for p in ("psd_band", "current_psd_band"):
        if p not in ds:
            continue
        b = ds[p].where(inside, drop=True)
        rel = relative_half_width(b.values, ds[f"{p}_low"].where(inside, drop=True).values,
                                  ds[f"{p}_high"].where(inside, drop=True).values)
        assert np.all(rel[b.values != 0] <= target), p
    assert float(ds.attrs["accuracy_reached"]) <= target
    assert ds.attrs["accuracy_stop"] == "accuracy"


def test_rounds_give_the_file_of_a_fixed_run_with_the_final_count():
    """Trajectory i always draws from the streams of (seed, i) and the rounds fold their
    chunks in index order: the adaptive file holds the same data as a fixed run of the final
    count with the same seed (and another number of workers)."""
    scen = grmc.load_scenario(text=_bd_text("trajectories = 16\nseed = 4"))
    ada = grmc.run(scen, accuracy=0.12, band_Hz=(200.0, 2.0e4), workers=2, progress=False)
    assert ada.attrs["rounds"] >= 2  # the check has teeth: more than one round merged
    n = int(ada.attrs["trajectories"])
    fixed_text = _bd_text(f"trajectories = {n}\nseed = 4\nduration_s = "
                          f"{ada.attrs['duration_s']!r}\nsamples = {ada.attrs['samples']}\n"
                          f"settle_s = {ada.attrs['settle_s']!r}")
    fixed = grmc.run(grmc.load_scenario(text=fixed_text), workers=1, progress=False)
    xr.testing.assert_identical(ada.drop_attrs(deep=False)[list(fixed.data_vars)],
                                fixed.drop_attrs(deep=False)[list(fixed.data_vars)])


def test_birth_death_bands_cover_van_vliet_lorentzian_and_the_stop_rule_holds():
    """A linear birth-death volume (generation g, loss k N): Poisson law and the Lorentzian
    S(f) = 4 var tau / (1 + (2 pi f tau)^2), var = g/k, tau = 1/k (K. M. van Vliet and
    J. R. Fassett, in Fluctuation Phenomena in Solids, Academic Press 1965, eq. for a single
    G-R level).  Averaged over each band's Fourier frequencies, it lies inside the band's
    interval in at least 85 % of the bands inside the target band (binomial bound)."""
    scen = grmc.load_scenario(text=_bd_text("seed = 11"))
    ds = grmc.run(scen, accuracy=0.1, band_Hz=(200.0, 2.0e4), workers=2, progress=False)
    _check_stop_rule(ds)
    # generation g = G V; at the steady state g = k mean, so tau = 1/k = mean / g
    g = scen.light.generation_cm3_s * scen.volume.volume_cm3
    mean = float(ds["steady_continuum"].sel(species="electrons"))
    tau = mean / g
    f = ds["frequency"].values
    lorentz = 4.0 * mean * tau / (1.0 + (2.0 * math.pi * f * tau) ** 2)
    truth = band_average(f, lorentz).mean
    e = ds.sel(species="electrons")
    inside = (ds["frequency_band"].values >= 200.0) & (ds["frequency_band"].values <= 2.0e4)
    lo, hi = e["psd_band_low"].values[inside], e["psd_band_high"].values[inside]
    t = truth[inside]
    misses = int(np.sum((t < lo) | (t > hi)))
    assert misses <= _misses_allowed(t.size), (misses, t.size)


@pytest.mark.parametrize("accuracy", [0.1, pytest.param(0.05, marks=pytest.mark.slow)])
def test_trap_level_bands_cover_the_exact_master_equation(accuracy):
    """Two traps in a volume of about 30 electrons: the exact master-equation spectrum of
    every species (finite state projection, grmc.exact), averaged over each band's Fourier
    frequencies, lies inside the band's interval in at least 85 % of the bands inside the
    target band (binomial bound), and the stop rule holds.  The band, 1e5-1e7 Hz, spans
    both corners (about 7e5 and 5e6 Hz)."""
    scen = grmc.load_scenario(text=trap_text("seed = 21"))
    ds = grmc.run(scen, accuracy=accuracy, band_Hz=(1.0e5, 1.0e7), workers=2, progress=False)
    _check_stop_rule(ds)
    f1, f2 = ds.attrs["accuracy_band_Hz"]
    centres = ds["frequency_band"].values
    inside = (centres >= f1) & (centres <= f2)
    f = ds["frequency"].values
    need = np.zeros(f.size, dtype=bool)  # only the Fourier frequencies of the bands checked
    kb = np.floor(np.log10(centres[inside]) * 10).astype(np.int64)
    need[np.isin(band_index(f), kb)] = True
    res = exact.solve(build_model(scen), freqs=f[need])
    psd = np.full((res.psd.shape[0], f.size), np.nan)
    psd[:, need] = res.psd
    truth = band_average(f, psd).mean[:, inside]
    lo = ds["psd_band_low"].values[:, inside]
    hi = ds["psd_band_high"].values[:, inside]
    misses = int(np.sum((truth < lo) | (truth > hi)))
    assert misses <= _misses_allowed(truth.size), (misses, truth.size)


def test_a_target_the_budget_cannot_meet_stops_with_a_warning(tmp_path, capsys):
    """A target far beyond a one-second budget: the run stops before the round it cannot
    pay for, writes the file with what was reached, warns in one line and exits 0."""
    (tmp_path / "bd.toml").write_text(_bd_text("trajectories = 16\nseed = 2"))
    out = tmp_path / "bd.nc"
    code = main(["run", str(tmp_path / "bd.toml"), "--accuracy", "0.001", "--band",
                 "200:2e4", "--max-seconds", "1", "-q", "-o", str(out)])
    assert code == 0
    err = capsys.readouterr().err
    warnings = [line for line in err.splitlines() if "warning" in line]
    assert len(warnings) == 1 and "max_seconds" in warnings[0] and "reached" in warnings[0]
    ds = load(out)
    assert ds.attrs["accuracy_stop"] == "budget"
    assert float(ds.attrs["accuracy_reached"]) > 0.001
    assert "psd_band" in ds
    assert _cf_errors(out) == []  # the file still passes the CF-1.11 checks (IOOS checker)


@pytest.mark.parametrize("args, named", [
    (["--accuracy", "0"], "--accuracy"),
    (["--accuracy", "1.5"], "--accuracy"),
    (["--accuracy", "0.1", "--band", "2e4:200"], "--band"),
    (["--accuracy", "0.1", "--band", "200:200"], "--band"),
    (["--accuracy", "0.1", "--max-seconds", "-5"], "--max-seconds"),
])
def test_bad_options_exit_2_naming_the_option(tmp_path, capsys, args, named):
    """Bad values on the command line: exit status 2, one line naming the option, nothing
    written (common practice for command-line tools)."""
    (tmp_path / "bd.toml").write_text(_bd_text("trajectories = 16"))
    out = tmp_path / "bd.nc"
    assert main(["run", str(tmp_path / "bd.toml"), "-o", str(out), *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and named in err[0] and "bd.toml" in err[0]
    assert not out.exists()


@pytest.mark.parametrize("line, key", [
    ("accuracy = 0.0", "accuracy"),
    ("accuracy = 1.5", "accuracy"),
    ("band_Hz = [2.0e4, 200.0]", "band_Hz"),
    ("max_seconds = -1.0", "max_seconds"),
])
def test_bad_scenario_keys_exit_2_naming_the_key(tmp_path, capsys, line, key):
    """Bad values in [run]: exit status 2, one line naming the file and the key."""
    (tmp_path / "bd.toml").write_text(_bd_text(f"trajectories = 16\n{line}"))
    out = tmp_path / "bd.nc"
    assert main(["run", str(tmp_path / "bd.toml"), "-o", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"[run] {key}" in err[0] and "bd.toml" in err[0]
    assert not out.exists()


@pytest.mark.parametrize("option, value", [("accuracy", 0.0), ("accuracy", 1.5),
                                           ("band_Hz", (2.0e4, 200.0)), ("max_seconds", -1.0)])
def test_bad_values_from_python_are_refused_naming_the_key(option, value):
    """The same values through grmc.run: a ScenarioError naming [run] and the key."""
    scen = grmc.load_scenario(text=_bd_text("trajectories = 16"))
    target = {"accuracy": 0.1, option: value}
    with pytest.raises(grmc.ScenarioError, match=rf"\[run\] {option}"):
        grmc.run(scen, progress=False, **target)


def test_a_band_the_window_cannot_resolve_is_refused_before_simulating(tmp_path, capsys):
    """A given window of 1 ms cannot resolve 1 Hz (a band needs at least one Fourier
    frequency, 1/T apart): exit 2 naming [run] band_Hz, nothing written."""
    (tmp_path / "bd.toml").write_text(_bd_text("duration_s = 1.0e-3\nsamples = 1024"))
    out = tmp_path / "bd.nc"
    assert main(["run", str(tmp_path / "bd.toml"), "--accuracy", "0.1", "--band", "1:100",
                 "-o", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "[run] band_Hz" in err[0]
    assert not out.exists()


def test_band_average_interval_is_welch_with_the_band_degrees_of_freedom():
    """A band of m Fourier frequencies averaged over K segments has 2 K m degrees of freedom
    (Welch 1967): its interval equals scipy's chi-squared quantiles for nu = 2 K m."""
    f = np.arange(1, 2001) * 5.0
    b = band_average(f, np.full(f.size, 2.0), segments=7)
    nu = 2 * 7 * b.counts
    np.testing.assert_allclose(b.low, nu * 2.0 / stats.chi2.ppf(0.975, nu), rtol=1e-12)
    np.testing.assert_allclose(b.high, nu * 2.0 / stats.chi2.ppf(0.025, nu), rtol=1e-12)
    # bands of the fixed grid: 10 per decade, each frequency in exactly one whole band
    assert np.all(np.diff(np.log10(b.centres)) >= 0.1 - 1e-9)
    assert np.all((b.edges[:, 0] <= b.centres) & (b.centres < b.edges[:, 1]))
    assert b.counts.sum() <= f.size


def test_a_chunk_reduced_from_a_pickled_plan_gives_the_same_accumulators():
    """The ensemble step is a pure function of (plan, trajectory indices): a plan sent to
    another process (pickled) reduces a chunk to the same numbers, and the chunk results
    merged in order equal one pass (exact reproducibility, common practice)."""
    import pickle

    from grmc.accumulators import Accumulators
    from grmc.chunk import reduce_chunk
    from grmc.plan import make_plan

    scen = grmc.load_scenario(text=_bd_text("trajectories = 8\nduration_s = 2.0e-3\n"
                                            "samples = 256\nseed = 5"))
    plan = make_plan(scen, slice_events=2.0e7)
    here = reduce_chunk(plan, range(4, 8))
    there = reduce_chunk(pickle.loads(pickle.dumps(plan)), range(4, 8))
    np.testing.assert_array_equal(here.count_spectrum.psd, there.count_spectrum.psd)
    np.testing.assert_array_equal(here.moments.sum_x2, there.moments.sum_x2)
    merged = Accumulators.for_plan(plan).merge(reduce_chunk(plan, range(0, 4))).merge(here)
    whole = grmc.run(scen, workers=1, progress=False)
    np.testing.assert_array_equal(merged.count_spectrum.mean(), whole["psd"].values)
    np.testing.assert_array_equal(merged.events.events, whole["events"].values)
