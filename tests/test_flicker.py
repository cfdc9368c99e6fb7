"""Trap levels with spread time constants: sub-levels, 1/f read-out, telegraph pixels."""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_run import _cf_errors

import grmc
from grmc import continuum, exact, flicker, spectra, spread
from grmc.dataset import save
from grmc.model import build_model, draw_counts, sublevel_scales
from grmc.report import format_run_table

KT_300 = 8.617333262e-5 * 300.0


def layer(*, volume=1.0e-14, traps="density_cm3 = 6.0e15", decades=3.0, extra="",
          run="", readout=True) -> str:
    """An n-type layer (1e17 donors) whose trap level sits at the Fermi level (half filled;
    E_t - E_i = kT ln(N_D / n_i), common practice) with its rates spread over ``decades``;
    band-to-band recombination (B of Si, Trupke et al. 2003) keeps a pixel without traps a
    model with channels."""
    text = f"""title = "spread trap level"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 4.73e-15
donors_cm3 = 1.0e17
[volume]
volume_cm3 = {volume!r}
[[traps]]
label = "ox"
{traps}
energy_eV = {KT_300 * math.log(1.0e7)!r}
electron_capture_cm3_s = 1.0e-10
hole_capture_cm3_s = 1.0e-10
spread_decades = {decades!r}
{extra}
[run]
{run}
"""
    if readout:
        text += """[readout]
bias_V = 0.1
length_cm = 1.0e-4
electron_mobility_cm2_Vs = 1000.0
hole_mobility_cm2_Vs = 400.0
"""
    return text


def sublevel_lorentzians(model, steady, f):
    """Sum over sub-levels of T_j Machlup Lorentzians 4 f(1-f) tau_j / (1 + (w tau_j)^2)
    of independent traps with pinned carrier densities (Machlup, J. Appl. Phys. 25, 341,
    1954; McWhorter 1957 superposition)."""
    vol = model.volume_cm3
    n, p = steady[0] / vol, steady[1] / vol
    trap = model.scenario.traps[0]
    tau0 = spread.trap_time_constant(trap, model.scenario.material, n, p)
    ni = model.scenario.material.intrinsic_density_cm3
    n1 = ni * math.exp(trap.energy_eV / KT_300)
    p1 = ni * math.exp(-trap.energy_eV / KT_300)
    cn, cp = trap.electron_capture_cm3_s, trap.hole_capture_cm3_s
    occ = (cn * n + cp * p1) / (cn * (n + n1) + cp * (p + p1))  # Shockley & Read 1952
    total = np.zeros_like(f)
    for scale, count in zip(model.level_scales, model.level_counts):
        tau = tau0 / scale
        total += count * spectra.lorentzian(f, occ * (1 - occ), tau)
    return total


# ------------------------------------------------------------------------ model and scenario
def test_zero_spread_is_todays_level():
    """D = 0 (the default) is the level as before: the same species, channels and
    coefficients, and identical run data, as a file without the key (exact equality)."""
    base = layer(decades=0.0, run="trajectories = 4\nduration_s = 1.0e-5\nsamples = 256")
    plain = base.replace("spread_decades = 0.0\n", "")
    a, b = grmc.load_scenario(text=base), grmc.load_scenario(text=plain)
    ma, mb = build_model(a), build_model(b)
    assert ma.species == mb.species == ma.output_species
    assert ma.describe() == mb.describe()
    da = grmc.run(a, progress=False, workers=1)
    db = grmc.run(b, progress=False, workers=1)
    assert "flicker_exponent" not in da
    for name in da.data_vars:
        np.testing.assert_array_equal(da[name].values, db[name].values, err_msg=name)


def test_sublevels_scale_capture_and_emission_together():
    """Two sub-levels per decade at the log-centres s_j = 10^(-D (j + 1/2) / n) of their
    shares; both capture coefficients scaled, so every sub-level's steady occupancy is the
    level's Shockley-Read occupancy (Shockley & Read, Phys. Rev. 87, 835, 1952)."""
    scen = grmc.load_scenario(text=layer(decades=3.0, traps="count = 60"))
    model = build_model(scen)
    np.testing.assert_allclose(model.level_scales, 10.0 ** (-3.0 * (np.arange(6) + 0.5) / 6))
    assert model.level_counts == (10,) * 6
    caps = [c.coefficient for c in model.channels if c.name.endswith("electron capture")]
    np.testing.assert_allclose(caps, 1.0e-10 / 1.0e-14 * np.asarray(model.level_scales))
    ss = continuum.steady_state(model)
    occ = model.project(ss)[3:] / 10.0
    np.testing.assert_allclose(occ, occ[0], rtol=1e-9)
    i_total = model.output_species.index("trapped:ox")
    assert model.project(ss)[i_total] == pytest.approx(ss[2:].sum())


def test_bad_spread_keys_are_refused():
    """A negative spread and a split per decade without a spread name their key."""
    with pytest.raises(grmc.ScenarioError, match="spread_decades"):
        grmc.load_scenario(text=layer(decades=-1.0))
    with pytest.raises(grmc.ScenarioError, match="sublevels_per_decade"):
        grmc.load_scenario(text=layer(decades=0.0, extra="sublevels_per_decade = 4"))


# ------------------------------------------------------------------------ linear noise
def test_lna_is_the_sum_of_sublevel_lorentzians():
    """The linear-noise spectrum of the level's total occupied count equals the sum of the
    sub-levels' Machlup Lorentzians (McWhorter's superposition).  Traps couple only through
    the free electrons, which change by one in N_e ~ 1e6 per capture; the tolerance is ten
    times that relative size."""
    scen = grmc.load_scenario(text=layer(volume=1.0e-11, decades=4.0, traps="count = 240"))
    model = build_model(scen)
    ss = continuum.steady_state(model)
    f = np.geomspace(1e2, 1e8, 61)
    psd = np.real(np.einsum("iif->if", model.project_matrix(continuum.lna_psd(model, f))))
    total = psd[model.output_species.index("trapped:ox")]
    expected = sublevel_lorentzians(model, ss, f)
    np.testing.assert_allclose(total, expected, rtol=10.0 * 240 / ss[0])


def test_finer_split_keeps_the_spectrum():
    """Two sub-levels per decade give the spectrum of a finer split (eight per decade) to
    within 1 % over the inner decades, well inside a run's interval (+-35 % at 16 segments,
    Welch 1967); one per decade misses by more, so the check can tell them apart."""
    f = np.geomspace(1e3, 1e6, 40)

    def total(per):
        text = layer(volume=1.0e-11, decades=4.0, traps="count = 960",
                     extra=f"sublevels_per_decade = {per}")
        model = build_model(grmc.load_scenario(text=text))
        smat = model.project_matrix(continuum.lna_psd(model, f))
        return np.real(smat[model.output_species.index("trapped:ox"),
                            model.output_species.index("trapped:ox")])

    fine = total(8)
    assert np.max(np.abs(total(2) / fine - 1)) < 0.01
    assert np.max(np.abs(total(1) / fine - 1)) > 0.02


def test_area_law_at_fixed_densities():
    """At fixed densities the relative count noise S_N(f) / N^2 at a frequency inside the
    band falls as 1/volume (the area law of 1/f noise, common practice): with 10 x the
    volume (all counts x 10) it is 10 x smaller, to the O(1/N) size of the coupling."""
    f = np.array([1e4, 1e5])

    def rel(volume):
        model = build_model(grmc.load_scenario(text=layer(volume=volume, decades=4.0,
                                                          traps="density_cm3 = 1.6e15")))
        ss = continuum.steady_state(model)
        s = np.real(continuum.lna_psd(model, f)[0, 0])
        return s / ss[0] ** 2, ss[0]

    small, n_small = rel(1.0e-14)
    large, _ = rel(1.0e-13)
    np.testing.assert_allclose(small / large, 10.0, rtol=10.0 / n_small)


# ------------------------------------------------------------------------ a single trap
def test_single_trap_drawn_from_the_spread_is_a_telegraph():
    """One trap (count = 1) draws its own sub-level, each equally likely (a chi-squared test
    over 1200 draws at the 0.1 % level); the drawn pixel's exact spectrum is Machlup's
    telegraph Lorentzian with that sub-level's dwell times tau_0 = 1/(s c_n n + s e_p),
    tau_1 = 1/(s e_n + s c_p p) (Machlup, J. Appl. Phys. 25, 341, 1954), to the 1/N_e
    coupling with ~1000 free electrons."""
    from scipy import stats

    text = layer(decades=6.0, traps="count = 1", run='dopants = "poisson"', readout=False)
    scen = grmc.load_scenario(text=text)
    rng = np.random.default_rng(7)
    draws = [draw_counts(scen, rng) for _ in range(1200)]
    where = np.array([int(np.argmax(c.split[0])) for c in draws])
    assert all(sum(c.split[0]) == 1 for c in draws)
    hist = np.bincount(where, minlength=12)
    assert stats.chisquare(hist).pvalue > 1e-3
    counts = draws[0]
    model = build_model(scen, counts=counts)
    j = int(np.argmax(counts.split[0]))
    s = float(sublevel_scales(scen.traps[0])[j])
    f = np.geomspace(1.0, 1e9, 37)
    res = exact.solve(model, freqs=f)
    vol = model.volume_cm3
    n, p = res.mean[0] / vol, res.mean[1] / vol
    trap = scen.traps[0]
    ni = scen.material.intrinsic_density_cm3
    n1, p1 = ni * math.exp(trap.energy_eV / KT_300), ni * math.exp(-trap.energy_eV / KT_300)
    cn, cp = s * trap.electron_capture_cm3_s, s * trap.hole_capture_cm3_s
    tau_0, tau_1 = 1.0 / (cn * n + cp * p1), 1.0 / (cn * n1 + cp * p)
    got = np.real(model.project_matrix(res.psd_matrix))[2, 2]
    np.testing.assert_allclose(got, spectra.telegraph_psd(f, tau_1, tau_0),
                               rtol=3.0 / res.mean[0])


def test_poisson_traps_per_sublevel():
    """A density's Poisson trap count falls on the sub-levels as independent Poisson counts
    of mean T/n: over 400 draws each sub-level's mean is within 4 standard errors of T/n and
    the level's total has the Poisson variance within 4 standard errors (common practice)."""
    scen = grmc.load_scenario(text=layer(decades=3.0, traps="density_cm3 = 1.2e15",
                                         run='dopants = "poisson"'))
    rng = np.random.default_rng(3)
    split = np.array([draw_counts(scen, rng).split[0] for _ in range(400)])
    mean = 1.2e15 * 1.0e-14 / 6
    se = math.sqrt(mean / 400)
    assert np.all(np.abs(split.mean(axis=0) - mean) < 4 * se)
    tot = split.sum(axis=1)
    # var of a sample variance of a Poisson law ~ (2 m^2 + m) / N
    assert abs(tot.var(ddof=1) - 6 * mean) < 4 * math.sqrt((2 * (6 * mean) ** 2 + 6 * mean)
                                                           / 400)


# ------------------------------------------------------------------------ the 1/f fit
def test_power_law_fit_is_unbiased_with_calibrated_errors():
    """Averaged periodograms drawn as S chi^2_{2k} / 2k (Welch 1967) around K / f^alpha:
    over 200 records the mean fitted alpha is within 4 standard errors of the truth and the
    spread of the estimates matches the stated error within 20 % (the spread of a standard
    deviation from 200 values is about 5 %)."""
    rng = np.random.default_rng(11)
    f = np.arange(1, 801) * 10.0
    k = 16
    truth = 3.0e-2 / f**0.9
    alphas, errs = [], []
    for _ in range(200):
        s = truth * rng.chisquare(2 * k, size=f.size) / (2 * k)
        fit = flicker.fit_power_law(f, s, k, band=(50.0, 5000.0))
        alphas.append(fit.alpha)
        errs.append(fit.alpha_err)
    alphas = np.array(alphas)
    assert abs(alphas.mean() - 0.9) < 4 * alphas.std(ddof=1) / math.sqrt(alphas.size)
    assert abs(alphas.std(ddof=1) / np.mean(errs) - 1) < 0.2
    # jackknife over 16 groups of one segment each: the same error within 30 %
    groups = truth * rng.chisquare(2, size=(16, f.size)) / 2
    jk = flicker.fit_power_law(f, groups.mean(axis=0), 16, band=(50.0, 5000.0), batches=groups)
    assert jk.errors.startswith("jackknife")
    assert abs(jk.alpha_err / np.mean(errs) - 1) < 0.3
    assert flicker.corner_frequency(2.0, 1.0, 0.5) == pytest.approx(4.0)


@pytest.fixture(scope="module")
def spread_run():
    """A layer with 60 traps spread over three decades, 64 trajectories (about 2e4 events
    each): the inner band 1.8e4 - 5.7e5 Hz lies inside what the run resolves."""
    text = layer(decades=3.0, run="trajectories = 64\nduration_s = 2.0e-4\nsamples = 2048\n"
                                  "seed = 5")
    scen = grmc.load_scenario(text=text)
    return scen, grmc.run(scen, progress=False, workers=2)


def test_mcwhorter_slope_is_minus_one(spread_run):
    """McWhorter's superposition of a log-uniform spread gives S ~ 1/f over the inner
    decades (McWhorter, in Semiconductor Surface Physics, 1957; common practice): the Monte
    Carlo exponent of the level's total, of the electrons and of the current is 1 within 3 of
    its jackknife standard errors; fitted to the linear-noise line over the same band, the
    discrete sub-levels and the band's ends move it by less than a third of that error."""
    scen, ds = spread_run
    band = ds.attrs["flicker_band_Hz"]
    model = build_model(scen)
    lna_band = spread.spread_band(model, continuum.steady_state(model))
    np.testing.assert_allclose(band, lna_band)  # the whole inner band is resolved
    for name in ("trapped:ox", "electrons"):
        sel = ds.sel(species=name)
        a, ae = float(sel["flicker_exponent"]), float(sel["flicker_exponent_stderr"])
        assert abs(a - 1.0) < 3 * ae, (name, a, ae)
        lna = flicker.fit_power_law(ds["frequency"].values, sel["psd_lna"].values, 1e12,
                                    band=tuple(band))
        assert abs(lna.alpha - 1.0) < ae / 3, (name, lna.alpha)
    a, ae = float(ds["current_flicker_exponent"]), float(ds["current_flicker_exponent_stderr"])
    assert abs(a - 1.0) < 3 * ae


def test_run_file_sums_sublevels_and_prints_the_fit(spread_run, tmp_path):
    """The file keeps ``trapped:<label>`` as the level's total: its mean is the sum of the
    sub-levels' means, its linear-noise variance the variance of the sum (it does not equal
    the sum of the sub-levels' variances only through their weak coupling); the flicker
    variables pass the registry and the CF checks, and the table prints the fit."""
    scen, ds = spread_run
    species = list(ds["species"].values)
    subs = [s for s in species if s.startswith("trapped:ox#")]
    assert len(subs) == 6 and "trapped:ox" in species
    np.testing.assert_allclose(float(ds["stationary_mean"].sel(species="trapped:ox")),
                               float(ds["stationary_mean"].sel(species=subs).sum()),
                               rtol=1e-12)
    v_sum = float(ds["var_lna"].sel(species=subs).sum())
    assert float(ds["var_lna"].sel(species="trapped:ox")) == pytest.approx(v_sum, rel=0.1)
    # the Monte Carlo variance of the total (from the sample times) against linear noise,
    # within 4 of its standard errors
    v = float(ds["stationary_var"].sel(species="trapped:ox"))
    ve = float(ds["stationary_var_stderr"].sel(species="trapped:ox"))
    assert abs(v - float(ds["var_lna"].sel(species="trapped:ox"))) < 4 * ve
    path = save(ds, tmp_path / "spread.nc")
    assert _cf_errors(path) == []  # IOOS compliance checker, cf:1.11 suite
    table = format_run_table(ds)
    assert "1/f fit" in table and "trapped:ox#" not in table


# ------------------------------------------------------------------------ populations
def test_population_sweep_telegraph_fraction_falls_with_volume(tmp_path):
    """A sweep over the volume with a population per point: at ~1 trap per pixel a third or
    more of the pixels are telegraph-like (one trap alone: Poisson P(1) = 0.37, common
    practice), at ~30 traps per pixel over three decades few are; the difference exceeds 3
    binomial standard errors.  The sweep file holds the fraction and the median noise and
    draws them against the volume."""
    from grmc import sweep
    from grmc.plotting import plot_population_sweep

    text = layer(volume=1.0e-15, decades=3.0, traps="density_cm3 = 1.0e15",
                 run='trajectories = 40\nduration_s = 2.0e-4\nsamples = 1024\n'
                     'dopants = "poisson"\nseed = 9', readout=False)
    text += "[population]\nfrequencies_Hz = [1.0e5]\n"
    scen = grmc.load_scenario(text=text)
    vary = sweep.parse_vary("volume.volume_cm3=1e-15:3e-14:2:log")
    results = []
    for i, assignment in enumerate(sweep.sweep_points([vary])):
        res = sweep.evaluate_point(sweep.point_scenario(scen, assignment), i)
        res["assignment"] = assignment
        results.append(res)
    ds = sweep.assemble(scen, [vary], results)
    frac = ds["telegraph_fraction"].values[:, 0]
    err = ds["telegraph_fraction_stderr"].values[:, 0]
    assert frac[0] > 0.3
    assert frac[0] - frac[1] > 3 * math.hypot(*err)
    assert ds["pixel_count_relative_noise_median"].dims == ("sweep", "noise_frequency")
    save(ds, tmp_path / "sweep.nc")
    for which in ("telegraph", "noise"):
        ax = plot_population_sweep(ds, which)
        assert len(ax.lines) >= 1 and ax.get_xscale() == "log"


def test_bad_spread_exits_2_naming_the_key(tmp_path, capsys):
    """``grmc check`` on a spread beyond the allowed range: exit status 2 and one line on
    stderr naming the file, the level and the key, nothing else."""
    from grmc.cli import main

    path = tmp_path / "bad.toml"
    path.write_text(layer(decades=13.0))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "bad.toml" in err and "traps.ox" in err and "spread_decades" in err


def test_exact_file_sums_the_sublevels(tmp_path):
    """``grmc exact`` on three single traps spread over six decades: the level's total has
    the binomial variance sum f (1 - f) of independent two-state traps (common practice),
    f the Shockley-Read occupancy, to the 1/N_e coupling through ~100 free electrons; its
    transient variance has relaxed to it by the end of the window."""
    from grmc.exact_output import exact_dataset

    text = layer(volume=1.0e-15, decades=6.0, traps="count = 3",
                 run="duration_s = 1.0e-2\nsamples = 256", readout=False)
    ds = exact_dataset(grmc.load_scenario(text=text))
    model = build_model(grmc.load_scenario(text=text))
    occ = model.project(continuum.steady_state(model))[2] / 3.0
    total = ds.sel(species="trapped:ox")
    n_e = float(ds["stationary_mean"].sel(species="electrons"))
    assert float(total["stationary_var"]) == pytest.approx(3 * occ * (1 - occ), rel=3 / n_e)
    subs = [s for s in ds["species"].values if str(s).startswith("trapped:ox#")]
    assert float(total["stationary_mean"]) == pytest.approx(
        float(ds["stationary_mean"].sel(species=subs).sum()), rel=1e-12)
    assert float(total["count_var"][-1]) == pytest.approx(float(total["stationary_var"]),
                                                          rel=1e-3)
    save(ds, tmp_path / "exact.nc")


def test_single_spread_trap_simulated_is_a_telegraph():
    """The Monte Carlo spectrum of one trap of a six-decade spread (rounded: it sits at the
    middle quantile, sub-level 5, s = 10^-2.75) is Machlup's telegraph Lorentzian with that
    sub-level's dwell times (Machlup, J. Appl. Phys. 25, 341, 1954): at the m frequencies up
    to a fifth of the sampling rate, the references outside the 95 % intervals (Welch 1967)
    are Binomial(m, 0.05); 4 of its standard deviations are allowed."""
    text = layer(decades=6.0, traps="count = 1", readout=False,
                 run="trajectories = 32\nduration_s = 3.0e-3\nsamples = 1024\nseed = 21")
    scen = grmc.load_scenario(text=text)
    model = build_model(scen)
    assert model.level_counts[5] == 1 and sum(model.level_counts) == 1
    ds = grmc.run(scen, progress=False, workers=2)
    n = float(ds["stationary_mean"].sel(species="electrons")) / model.volume_cm3
    trap = scen.traps[0]
    ni = scen.material.intrinsic_density_cm3
    n1 = ni * math.exp(trap.energy_eV / KT_300)
    s = 10.0 ** -2.75
    cn = s * trap.electron_capture_cm3_s  # holes (~1e3 cm^-3) and p_1 ~ 1e3 cm^-3 negligible
    tau_0, tau_1 = 1.0 / (cn * n), 1.0 / (cn * n1)
    f = ds["frequency"].values
    sel = f <= ds.attrs["samples"] / ds.attrs["duration_s"] / 5
    ref = spectra.telegraph_psd(f[sel], tau_1, tau_0)
    tot = ds.sel(species="trapped:ox")
    out = np.sum((ref < tot["psd_low"].values[sel]) | (ref > tot["psd_high"].values[sel]))
    m = int(sel.sum())
    assert abs(out - 0.05 * m) < 4 * math.sqrt(m * 0.05 * 0.95), (out, m)


def test_fit_band_is_cut_to_the_resolved_frequencies():
    """The fit band: the user's band cut to the resolved frequencies (above the third
    periodogram frequency, below a fifth of the sampling rate); the spread's band cut the
    same way and narrowed to stay centred in log f on the spread (by symmetry of a
    log-uniform superposition, McWhorter 1957)."""
    f = np.arange(1, 1025) * 100.0  # Nyquist 102.4 kHz
    assert flicker.fit_band((1.0, 1.0e6), None, f) == pytest.approx((300.0, 0.4 * 102400.0))
    assert flicker.fit_band((1.0e3, 1.0e4), (1.0, 1.0e9), f) == pytest.approx((1.0e3, 1.0e4))
    lo, hi = flicker.fit_band(None, (1.0e2, 1.0e6), f)
    assert hi == pytest.approx(0.4 * 102400.0) and lo == pytest.approx(1.0e4 * 1.0e4 / hi)
    assert flicker.fit_band(None, None, f) is None
