"""A volume open to a neighbouring region (`[reservoir]`): pair exchange, junction current.

References named beside each check.  Statistical tolerances: means within 4 standard errors
of the run's own estimate; spectra by the binomial count of references outside the 95 %
intervals (``tests/intervals.py``); fixed seeds.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from intervals import current_outside
from scipy import stats

import grmc
from grmc import continuum, exact, spectra
from grmc.model import ELEMENTARY_CHARGE_C as Q
from grmc.model import build_model
from grmc.readout import exact_current, lna_current
from grmc.scenario import ScenarioError, load_scenario

# An intrinsic box with no recombination, open to a region with 5e15 holes/cm^3: c_r V = 5
# pairs on average, exchange time 1 ns.  N is a birth-death process with constant birth
# R = c_r V / t_x and linear death N / t_x: an M/M/infinity queue.
BOX = """
title = "exchange box"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
[volume]
volume_cm3 = 1.0e-15
[reservoir]
carrier = "holes"
density_cm3 = 5.0e15
exchange_time_s = 1.0e-9
[readout]
bias_V = 1.0
length_cm = 1.0e-5
electron_mobility_cm2_Vs = 100.0
hole_mobility_cm2_Vs = 100.0
collection = "events"
[run]
trajectories = 64
duration_s = 2.0e-7
samples = 1024
settle_s = 2.0e-8
seed = 17
"""
MEAN, T_X = 5.0, 1.0e-9
RATE = MEAN / T_X  # crossings per second in each direction

# A p-type junction pixel small enough for the master equation: 10 acceptors, radiative
# recombination competing with collection at the junction, light, and a reservoir of
# 1e15 electrons/cm^3 (one electron per volume) on the far side.  Nonlinear: the loss
# B N_e N_h / V has N_h = N_e + 10.  Illustrative numbers.
PIXEL = """
title = "junction pixel"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e6
radiative_cm3_s = 1.0e-10
acceptors_cm3 = 1.0e16
[volume]
volume_cm3 = 1.0e-15
[light]
generation_cm3_s = 1.0e22
[reservoir]
carrier = "electrons"
density_cm3 = 1.0e15
exchange_time_s = 1.0e-6
[readout]
bias_V = 0.0
length_cm = 1.0e-5
electron_mobility_cm2_Vs = 0.0
hole_mobility_cm2_Vs = 0.0
collection = "events"
[run]
trajectories = 64
duration_s = 2.0e-4
samples = 1024
settle_s = 1.0e-5
seed = 5
"""


def _box(**changes) -> str:
    text = BOX
    for old, new in changes.items():
        text = text.replace(old, new)
    return text


# ----------------------------------------------------------------------------- scenario
def test_exchange_time_needs_a_source(tmp_path):
    """No exchange time and no readout to take a transit time from: refused, naming the key."""
    text = BOX.split("[readout]")[0].replace('exchange_time_s = 1.0e-9\n', "")
    with pytest.raises(ScenarioError, match=r"\[reservoir\] exchange_time_s"):
        load_scenario(text=text)


def test_exchange_time_defaults_to_transit_time():
    """Without exchange_time_s the kind's transit time L^2 / (mu bias) is used."""
    scen = load_scenario(text=_box(**{"exchange_time_s = 1.0e-9\n": ""}))
    model = build_model(scen)
    out = model.channels[model.channel_names.index("holes swept out")]
    assert out.coefficient == pytest.approx(100.0 * 1.0 / 1.0e-5**2)


def test_unknown_reservoir_key_is_refused():
    with pytest.raises(ScenarioError, match=r"\[reservoir\] densty_cm3.*density_cm3"):
        load_scenario(text=_box(**{"density_cm3 = 5.0e15": "densty_cm3 = 5.0e15"}))


def test_volume_without_definite_type_is_refused(tmp_path):
    """Holes exchanged as pairs in a p-type volume: the electrons could run out; the CLI says
    so in one line naming the key, exits 2 and writes nothing."""
    text = _box(**{"[volume]": "acceptors_cm3 = 3.0e15\n[volume]"})
    with pytest.raises(ScenarioError, match=r"\[reservoir\] carrier: .*n-type"):
        build_model(load_scenario(text=text))
    path = tmp_path / "bad.toml"
    path.write_text(text)
    from grmc.cli import main
    out = tmp_path / "bad.nc"
    assert main(["run", str(path), "-o", str(out)]) == 2
    assert not out.exists()


def test_population_pixel_without_definite_type_is_refused():
    """With Poisson dopants every pixel's draw is checked before anything is simulated."""
    text = _box(**{"[volume]": "donors_cm3 = 1.0e15\n[volume]",
                   "[reservoir]": "[[traps]]\nlabel = \"t\"\ncount = 1\nelectron_capture_cm3_s"
                                  " = 1e-8\nhole_capture_cm3_s = 1e-8\n[reservoir]",
                   "seed = 17": "seed = 17\ndopants = \"poisson\""})
    with pytest.raises(ScenarioError, match=r"pixel \d+ of the population"):
        grmc.run(load_scenario(text=text), workers=1, progress=False)


# ----------------------------------------------------------------------------- model
def test_channels_move_pairs_and_cross_the_junction():
    """Sweep-out and entry move one pair each (charge kept), carry flow +1 / -1, and with a
    reservoir no separate majority collection is counted."""
    model = build_model(load_scenario(text=BOX))
    assert model.channel_names == ("holes swept out", "holes from reservoir")
    assert np.all(model.stoich @ model.charge_weights == 0)
    assert tuple(model.flow_weight) == (1, -1)
    assert model.channels[1].coefficient == pytest.approx(RATE)


# ----------------------------------------------------------------------------- exact theory
def test_exchange_box_law_is_poisson():
    """Constant arrivals and independent departures: the stationary law of the M/M/infinity
    queue is Poisson with mean R t_x (Kleinrock, Queueing Systems vol. 1, Wiley 1975,
    from memory)."""
    res = exact.solve(build_model(load_scenario(text=BOX)))
    values, prob = res.marginal("holes")
    np.testing.assert_allclose(prob, stats.poisson.pmf(values, MEAN), atol=1e-12)


def _net_crossing_psd(f):
    """Net crossings J = out - in = -dN/dt exactly, so S_J = w^2 S_N with S_N the Lorentzian
    4 var tau / (1 + (w tau)^2) of a linear birth-death process (van Vliet & Fassett 1965,
    from memory), var = mean = R t_x: S_J = 4 R (w t_x)^2 / (1 + (w t_x)^2) [s^-1]."""
    wt = 2 * np.pi * f * T_X
    return 4 * RATE * wt**2 / (1 + wt**2)


def test_junction_current_spectrum_exact_and_linear_noise():
    """Exact (master equation) and linear-noise current spectra equal the closed form; the
    white level is the full shot noise of both directions, 2 q (I_out + I_in) = 4 q I_0 of a
    junction at zero bias (van der Ziel, Noise in Solid State Devices and Circuits, Wiley
    1986, from memory); the mean current is zero."""
    model = build_model(load_scenario(text=BOX))
    f = np.logspace(5, 12, 15)
    res = exact.solve(model, freqs=f)
    cur = exact_current(model, res)
    lna = lna_current(model, f)
    np.testing.assert_allclose(cur.psd, Q**2 * _net_crossing_psd(f), rtol=1e-8)
    np.testing.assert_allclose(lna.psd, Q**2 * _net_crossing_psd(f), rtol=1e-8)
    assert cur.white == pytest.approx(4 * Q * Q * RATE, rel=1e-10)
    assert abs(cur.mean) < 1e-9 * Q * RATE


def test_exact_flux_equals_doubly_stochastic_formula_for_ohmic_collection():
    """For a photoconductor bar (collection without a change of counts) the collections are
    a doubly stochastic Poisson process of intensity N_e/t_n + N_h/t_p, so S_I = 2 q I +
    q^2 S_intensity (Cox, J. R. Stat. Soc. B 17, 129, 1955, from memory): the exact flux
    spectrum must equal that combination of the exact count spectra."""
    text = PIXEL.split("[reservoir]")[0] + """
[readout]
bias_V = 1.0
length_cm = 1.0e-4
electron_mobility_cm2_Vs = 10.0
hole_mobility_cm2_Vs = 3.0
collection = "events"
"""
    model = build_model(load_scenario(text=text))
    f = np.logspace(3, 8, 9)
    res = exact.solve(model, freqs=f)
    t_n = 1e-4**2 / 10.0
    t_p = 1e-4**2 / 3.0
    a = np.array([1 / t_n, 1 / t_p])
    s = res.psd_matrix
    gr = a[0]**2 * s[0, 0].real + 2 * a[0] * a[1] * s[0, 1].real + a[1]**2 * s[1, 1].real
    mean_flux = a @ res.mean[:2]
    assert res.flux_mean == pytest.approx(mean_flux, rel=1e-10)
    np.testing.assert_allclose(res.flux_psd, 2 * mean_flux + gr, rtol=1e-8)


def test_linear_noise_flux_matches_exact_in_a_large_volume():
    """The linear-noise current spectrum is the large-volume limit of the exact one (van
    Kampen ch. X): the junction pixel scaled up 30 times agrees to a few per cent."""
    scale = 30.0
    text = (PIXEL.replace("volume_cm3 = 1.0e-15", f"volume_cm3 = {1e-15 * scale:g}")
            .replace("radiative_cm3_s = 1.0e-10", f"radiative_cm3_s = {1e-10 * scale:g}")
            .replace("acceptors_cm3 = 1.0e16", f"acceptors_cm3 = {1e16 / scale:g}")
            .replace("density_cm3 = 1.0e15", f"density_cm3 = {1e15 / scale:g}"))
    text = text.replace("generation_cm3_s = 1.0e22", f"generation_cm3_s = {1e22 / scale:g}")
    model = build_model(load_scenario(text=text))
    f = np.logspace(3, 8, 6)
    res = exact.solve(model, freqs=f)
    cur, lna = exact_current(model, res), lna_current(model, f)
    np.testing.assert_allclose(lna.psd, cur.psd, rtol=0.05)
    assert lna.mean == pytest.approx(cur.mean, rel=0.02)


# ----------------------------------------------------------------------------- Monte Carlo
def test_monte_carlo_exchange_box_current():
    """The simulated junction current of the exchange box against the closed form: mean count
    R t_x, white level 4 q^2 R, and the spectrum 4 q^2 R (w t_x)^2 / (1 + (w t_x)^2) as a
    rectangular-window periodogram of segment length T sees it: the Lorentzian part times
    its window factor (Wiener-Khinchin with the triangular lag window,
    :func:`grmc.spectra.rectangular_window_factor`).  At the lowest bins that window raises
    the estimate several times above the true spectrum, which falls as f^2."""
    ds = grmc.run(load_scenario(text=BOX), workers=2, progress=False)
    h = list(ds["species"].values).index("holes")
    assert abs(float(ds["stationary_mean"][h]) - MEAN) < 4 * float(
        ds["stationary_mean_stderr"][h])
    n_cross = float(ds["events"].sum())  # Poisson-like count of crossings
    assert abs(float(ds["current_shot_noise"]) - 4 * Q * Q * RATE) < (
        4 * 4 * Q * Q * RATE / math.sqrt(n_cross))
    t_seg = ds.attrs["duration_s"] / spectra.choose_segments(ds.attrs["trajectories"],
                                                             ds.attrs["samples"])

    def expected(f):
        window = spectra.rectangular_window_factor(f, 1 / (2 * np.pi * T_X), t_seg)
        return Q**2 * 4 * RATE * (1 - window / (1 + (2 * np.pi * f * T_X) ** 2))

    out, m, width = current_outside(ds, expected)
    assert abs(out - 0.05 * m) < width, (out, m)
    # the lowest bin shows the window: far above the true spectrum, at the window's value
    f0 = float(ds["frequency"][0])
    assert float(ds["current_psd_low"][0]) > 2 * Q**2 * _net_crossing_psd(f0)


def test_monte_carlo_junction_pixel_against_master_equation():
    """The nonlinear junction pixel: mean counts and mean current (q times net crossings per
    second) from the simulation agree with the exact master equation within 4 s.e., and its
    current spectrum with the exact one (Welch intervals, binomial count)."""
    scen = load_scenario(text=PIXEL)
    ds = grmc.run(scen, workers=2, progress=False)
    model = build_model(scen)
    f = ds["frequency"].values
    res = exact.solve(model, freqs=f)
    cur = exact_current(model, res)
    for s in range(2):
        assert abs(float(ds["stationary_mean"][s]) - res.mean[s]) < 4 * float(
            ds["stationary_mean_stderr"][s])
    # the mean current: its s.e. from the spread of the per-trajectory counts is not stored;
    # the crossings are bounded by a Poisson count of sweep-outs plus entries
    crossings = float(ds["events"].values[[model.channel_names.index(n) for n in
                                           ("electrons swept out",
                                            "electrons from reservoir")]].sum())
    tot = ds.attrs["trajectories"] * ds.attrs["duration_s"]
    assert abs(float(ds["current_mean"]) - cur.mean) < 4 * Q * math.sqrt(crossings) / tot
    out, m, width = current_outside(ds, cur.psd)
    assert abs(out - 0.05 * m) < width, (out, m)
    # and the continuum's answer is visibly off in this few-carrier volume
    assert abs(continuum.steady_state(model)[0] - res.mean[0]) > 4 * float(
        ds["stationary_mean_stderr"][0])


def test_junction_current_follows_modulated_light():
    """The exchange box lit by light modulated as G V (1 + m sin w t): N is a linear
    birth-death process, so the junction current q (N - c_r V) / t_x responds at the drive
    frequency with amplitude (q / t_x) G V m / sqrt(w^2 + t_x^-2) and phase -atan(w t_x)
    (transfer function of a first-order system, common practice).  The Monte Carlo lock-in,
    the continuum answer stored beside it and the closed form agree within 4 s.e."""
    gv, m, f_mod = 5.0e9, 0.5, 1.0e8
    text = _box(**{"[reservoir]": f"""[light]
generation_cm3_s = {gv / 1e-15:g}
waveform = "sine"
modulation_frequency_Hz = {f_mod:g}
modulation_depth = {m:g}
[reservoir]"""})
    ds = grmc.run(load_scenario(text=text), workers=2, progress=False)
    w = 2 * np.pi * f_mod
    amp = Q / T_X * gv * m / math.sqrt(w**2 + T_X**-2)
    phase = -math.atan(w * T_X)
    got, err = float(ds["current_response_amplitude"]), float(
        ds["current_response_amplitude_stderr"])
    ph, ph_err = float(ds["current_response_phase"]), float(ds["current_response_phase_stderr"])
    assert float(ds["current_response_amplitude_continuum"]) == pytest.approx(amp, rel=1e-9)
    assert float(ds["current_response_phase_continuum"]) == pytest.approx(phase, abs=1e-9)
    assert err < 0.1 * amp  # resolved: the check has power
    assert abs(got - amp) < 4 * err
    assert abs(ph - phase) < 4 * ph_err


def test_exact_command_writes_the_junction_current(tmp_path):
    """`grmc exact` on the exchange box: the file's current spectrum is the closed form above,
    its white level 4 q^2 R, and an export says what the current is."""
    from grmc.cli import main

    scen, out, csv = tmp_path / "box.toml", tmp_path / "box.nc", tmp_path / "box.csv"
    scen.write_text(BOX)
    assert main(["exact", str(scen), "-o", str(out)]) == 0
    import xarray as xr

    with xr.open_dataset(out) as ds:
        f = ds["frequency"].values
        np.testing.assert_allclose(ds["current_psd"].values, Q**2 * _net_crossing_psd(f),
                                   rtol=1e-7)
        assert float(ds["current_shot_noise"]) == pytest.approx(4 * Q * Q * RATE, rel=1e-9)
    assert main(["export", str(out), "--format", "csv", "-o", str(csv)]) == 0
    assert "junction current" in csv.read_text().splitlines()[2]
