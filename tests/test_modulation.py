"""Modulated light: scenario keys, the continuum transfer function, the lock-in, and the
Monte Carlo response against the transfer function of a linear system."""

from __future__ import annotations

import math

import numpy as np
import pytest
from birth_death import birth_death_box

import grmc
from grmc import continuum, spectra
from grmc.scenario import ScenarioError

Z = 4.0  # z-score bound (two-sided p = 6e-5 per check), fixed seeds


def birth_death(waveform: str, *, freq=2.0e3, depth=0.5, trajectories=64, seed=9) -> str:
    # the shared birth-death box (tests/birth_death.py): k ~ 1e4 /s, mean g/k = 10 electrons
    return birth_death_box(title="modulated birth-death", light=f"""
waveform = "{waveform}"
modulation_frequency_Hz = {freq}
modulation_depth = {depth}""", more=f"""
[run]
trajectories = {trajectories}
duration_s = 5.0e-3
samples = 1024
settle_s = 1.0e-3
seed = {seed}
""")


def test_scenario_rules():
    with pytest.raises(ScenarioError, match=r"\[light\] modulation_frequency_Hz"):
        grmc.load_scenario(text=birth_death("sine", freq=0.0))
    with pytest.raises(ScenarioError, match=r"\[light\] modulation_depth"):
        grmc.load_scenario(text=birth_death("sine", depth=1.5))
    with pytest.raises(ScenarioError, match="would be ignored"):
        grmc.load_scenario(text=birth_death("steady"))
    model = grmc.build_model(grmc.load_scenario(text=birth_death("square")))
    channel, kind, f, m, _ = model.modulation
    assert model.channel_names[channel] == "optical generation" and kind == 2
    assert (f, m) == (2.0e3, 0.5)


def test_transfer_function_of_a_first_order_system():
    """dn/dt = g(t) - k n driven by g = g0 (1 + m sin w t): amplitude g0 m / sqrt(k^2 + w^2),
    phase -atan(w / k) (the first-order low-pass; common practice)."""
    model = grmc.build_model(grmc.load_scenario(text=birth_death("sine")))
    amp, ph = continuum.drive_response(model, channel=model.modulation[0], kind=1,
                                       frequency_Hz=2.0e3, depth=0.5)
    x = continuum.steady_state(model)
    k = 1.0e-16 * x[1] / 1.0e-15
    g0, w = 1.0e5, 2 * math.pi * 2.0e3
    # holes follow electrons exactly (pair channels), so both respond alike; the loss rate
    # also depends on N_h, a relative correction of order N_e/N_h = 1e-4
    assert amp[0] == pytest.approx(g0 * 0.5 / math.hypot(k, w), rel=3e-4)
    assert ph[0] == pytest.approx(-math.atan(w / k), abs=3e-4)


def test_lock_in_recovers_a_sine_exactly():
    dt, f = 1.0e-6, 1.7e3
    t0 = np.arange(4096) * dt
    R, phi = 2.5, 0.7
    w = 2 * math.pi * f
    # exact bin averages of 3 + R sin(w t + phi) over [t0, t0 + dt]
    bins = 3.0 + R * (np.cos(w * t0 + phi) - np.cos(w * (t0 + dt) + phi)) / (w * dt)
    a, b = spectra.drive_quadratures(bins, dt, f)
    assert math.hypot(a, b) == pytest.approx(R, rel=1e-3)
    assert math.atan2(b, a) == pytest.approx(phi, abs=1e-3)


@pytest.mark.parametrize("waveform", ["sine", "square"])
def test_monte_carlo_response_matches_the_transfer_function(waveform):
    """The ensemble's response at the drive frequency equals the continuum transfer function
    within its standard errors: for a linear birth-death process the mean obeys the rate
    equation exactly (common practice), and thinning makes the modulated generation exact
    (Lewis & Shedler, Naval Res. Logist. Q. 26, 403, 1979).  A square wave drives the
    fundamental with amplitude 4 m / pi (Fourier series of a square wave)."""
    ds = grmc.run(grmc.load_scenario(text=birth_death(waveform)), workers=2, progress=False)
    e = ds.sel(species="electrons")
    amp, err = float(e["response_amplitude"]), float(e["response_amplitude_stderr"])
    ph, ph_err = float(e["response_phase"]), float(e["response_phase_stderr"])
    c_amp, c_ph = float(e["response_amplitude_continuum"]), float(e["response_phase_continuum"])
    assert abs(amp - c_amp) < Z * err
    assert abs(ph - c_ph) < Z * ph_err
    assert err < 0.1 * c_amp  # the test has power: the response is well resolved


def test_sliced_trajectories_keep_the_drive_phase(monkeypatch):
    """Cut into many time slices, a trajectory still sees one continuous waveform: the
    response still matches the transfer function (same bound as above)."""
    import grmc.simulate as sim

    monkeypatch.setattr(sim, "SLICE_EVENTS", 37.0)  # slices that do not align with periods
    scen = grmc.load_scenario(text=birth_death("sine", seed=12))
    assert sim._slice_plan(sim.prepare(grmc.build_model(scen)), scen.run).window_slices > 8
    ds = grmc.run(scen, workers=2, progress=False)
    e = ds.sel(species="electrons")
    assert abs(float(e["response_amplitude"]) - float(e["response_amplitude_continuum"])) \
        < Z * float(e["response_amplitude_stderr"])
    assert abs(float(e["response_phase"]) - float(e["response_phase_continuum"])) \
        < Z * float(e["response_phase_stderr"])
