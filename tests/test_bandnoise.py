"""Noise in a band: closed forms, interval coverage, and the readout band of run and exact
files.

References: the band integral of one Lorentzian,
integral_{f1}^{f2} S0 / (1 + (f/f_c)^2) df = S0 f_c [arctan(f2/f_c) - arctan(f1/f_c)]
(elementary calculus); the scatter of an averaged periodogram S chi^2_{2K} / 2K (Welch, IEEE
Trans. Audio Electroacoust. 15, 70, 1967); Satterthwaite's approximation (Biometrics
Bulletin 2, 110, 1946) for the interval of the weighted sum.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import grmc
from grmc import bandnoise, dataset, spectra
from grmc.cli import main
from grmc.exact_output import exact_dataset
from grmc.report import format_run_table

ROOT = Path(__file__).resolve().parents[1]
S0, FC = 2.0e-22, 3.0e5


def lorentz_band_power(f1: float, f2: float) -> float:
    """S0 f_c [arctan(f2/f_c) - arctan(f1/f_c)] (closed form)."""
    return S0 * FC * (math.atan(f2 / FC) - math.atan(f1 / FC))


def test_band_power_of_a_lorentzian_in_closed_form():
    f = np.arange(1, 20001) * 1e3  # a periodogram grid j/T, T = 1 ms
    s = spectra.lorentzian(f, S0 * math.pi * FC / 2, 1 / (2 * math.pi * FC))
    band = (2.5e4, 7.77e6)  # edges between grid points: interpolated
    res = bandnoise.band_noise(f, s, band)
    # the trapezoid rule's error is h^2/12 (f2 - f1) max|S''|, h = 1 kHz: below 1e-5 here
    assert res.power == pytest.approx(lorentz_band_power(*band), rel=1e-5)
    assert res.rms == pytest.approx(math.sqrt(lorentz_band_power(*band)), rel=1e-5)
    assert res.low == res.high == res.rms  # an exact spectrum: no interval
    # a theory curve integrated on its own log grid, over a band wider than any file's
    rms = bandnoise.band_variables(f, s, (1.0, 1e9), lna=lambda x: spectra.lorentzian(
        x, S0 * math.pi * FC / 2, 1 / (2 * math.pi * FC)))["current_noise_rms_lna"][1]
    assert rms == pytest.approx(math.sqrt(lorentz_band_power(1.0, 1e9)), rel=1e-4)
    with pytest.raises(ValueError, match="not inside"):
        bandnoise.band_noise(f, s, (10.0, 1e6))


def test_band_interval_covers_the_truth():
    # 400 independent averaged periodograms (K = 8) of one Lorentzian, fixed seed: the 95 %
    # interval of the band rms must cover the true value in 95 % of them, within three
    # binomial standard errors sqrt(0.95 * 0.05 / 400) = 0.011
    rng = np.random.default_rng(11)
    k, n_rep = 8, 400
    f = np.arange(1, 401) * 1e4
    true = spectra.lorentzian(f, S0 * math.pi * FC / 2, 1 / (2 * math.pi * FC))
    band = (3e4, 2e6)
    truth = math.sqrt(float(np.sum(bandnoise.band_weights(f, band) * true)))
    hits = 0
    for _ in range(n_rep):
        est = true * rng.chisquare(2 * k, f.size) / (2 * k)
        low, high = spectra.welch_interval(est, k)
        res = bandnoise.band_noise(f, est, band, low=low, high=high)
        hits += res.low <= truth <= res.high
    assert abs(hits / n_rep - 0.95) <= 3 * math.sqrt(0.95 * 0.05 / n_rep)


def test_scenario_band_key(tmp_path, capsys):
    text = (ROOT / "scenarios" / "photodiode_junction.toml").read_text()
    ok = grmc.load_scenario(text=text.replace('collection = "events"',
                                              'collection = "events"\nband_Hz = [1e3, 1e7]'))
    assert ok.readout.band_Hz == (1e3, 1e7)
    for bad in ("[1e7, 1e3]", "[0, 1e3]", "[1e3]", '["a", 2]'):
        path = tmp_path / "bad.toml"
        path.write_text(text.replace('collection = "events"',
                                     f'collection = "events"\nband_Hz = {bad}'))
        assert main(["check", str(path)]) == 2
        err = capsys.readouterr().err
        assert "[readout] band_Hz" in err and str(path) in err and "Traceback" not in err


def test_exact_file_band_noise():
    # grmc exact: the exact spectrum integrated over the band (no interval), the linear-noise
    # value beside it; for this junction volume the collected stream is nearly Poisson, so
    # both are close to the shot noise sqrt(2 q I (f2 - f1)) (Schottky 1918)
    text = (ROOT / "scenarios" / "photodiode_junction.toml").read_text()
    text = text.replace('collection = "events"', 'collection = "events"\nband_Hz = [1e5, 1e7]')
    ds = exact_dataset(grmc.load_scenario(text=text))
    res = bandnoise.band_noise(ds.frequency.values, ds.current_psd.values, (1e5, 1e7))
    assert float(ds.current_noise_rms) == pytest.approx(res.rms, rel=1e-12)
    assert "current_noise_rms_low" not in ds
    shot = math.sqrt(2 * 1.602176634e-19 * abs(float(ds.current_mean)) * (1e7 - 1e5))
    assert float(ds.current_noise_rms) == pytest.approx(shot, rel=0.01)
    assert float(ds.current_noise_rms_lna) == pytest.approx(float(ds.current_noise_rms),
                                                            rel=0.01)
    assert list(ds.current_noise_rms.attrs["band_Hz"]) == [1e5, 1e7]


def test_run_file_band_noise_and_table(tmp_path):
    # grmc run: the band rms of the Monte Carlo current with its 95 % interval, which covers
    # the linear-noise value (the demo pixel's linear-noise spectrum is within 0.6 % of its
    # exact master-equation spectrum, measured with grmc exact: far inside the interval of 16
    # trajectories)
    text = (ROOT / "scenarios" / "demo_pixel.toml").read_text()
    text = text.replace("hole_mobility_cm2_Vs = 800.0",
                        "hole_mobility_cm2_Vs = 800.0\nband_Hz = [1.0e5, 1.0e7]")
    text = text.replace("duration_s = 1.0e-4", "duration_s = 2.0e-5").replace(
        "samples = 8192", "samples = 2048")
    ds = grmc.run(grmc.load_scenario(text=text), trajectories=16, workers=1, progress=False)
    rms, lo, hi = (float(ds[f"current_noise_rms{s}"]) for s in ("", "_low", "_high"))
    assert lo < rms < hi
    assert lo <= float(ds.current_noise_rms_lna) <= hi
    table = format_run_table(ds)
    assert "rms noise over 1e+05 .. 1e+07 Hz" in table and "linear noise" in table
    # registered variables, the band as an attribute: the file passes the CF checks
    from test_run import _cf_errors

    path = dataset.save(ds, tmp_path / "band.nc")
    assert _cf_errors(path) == []
    assert dataset.load(path)["current_noise_rms"].attrs["units"] == "A"
