"""SPICE noise subcircuits: closed forms, the spectral factor, and a real circuit simulator.

References named beside each check:
- Johnson-Nyquist noise of a resistor, 4kTR (Nyquist, Phys. Rev. 32, 110, 1928), through a
  first-order RC low-pass: 4kTR / (1 + (2 pi f R C)^2) (common practice);
- shot noise 2qI (Schottky, Ann. Phys. 57, 541, 1918);
- the minimum-phase spectral factor of a rational spectrum (Papoulis & Pillai, Probability,
  Random Variables and Stochastic Processes, 2002, section 11-1, from memory), evaluated
  independently with scipy.signal.freqs_zpk;
- ngspice's small-signal noise analysis (``.noise``, ngspice 39 as packaged by Debian), run
  for real; skipped only where the ngspice binary is absent.

The circuit round trips check the 2 % of the issue at every analysis point from 1 Hz to
100 GHz (ten points per decade) between ngspice's output noise and the exported spectrum.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

import grmc
from grmc import dataset, rational, spice
from grmc.cli import main
from grmc.export import read_noise_table, spectrum_table
from grmc.export_curve import export_curve
from grmc.exact_output import exact_dataset
from grmc.model import ELEMENTARY_CHARGE_C
from ngspice_bench import NGSPICE, SKIP_REASON, noise_analysis

ROOT = Path(__file__).resolve().parents[1]
needs_ngspice = pytest.mark.skipif(NGSPICE is None, reason=SKIP_REASON)
ROUND_TRIP = 0.02  # the 2 % between ngspice and the exported spectrum


def _junction_text(dark: bool) -> str:
    text = (ROOT / "scenarios" / "photodiode_junction.toml").read_text()
    if dark:  # forward-biased junction in the dark: crossings both ways, S(0) well below 4qI0
        text = text.replace("generation_cm3_s = 5.0e21", "generation_cm3_s = 0.0")
        text = text.replace("density_cm3 = 2.0e3 ", "density_cm3 = 1.0e15 ")
    return text


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A small Monte Carlo run of the demo pixel, exact files of two junction volumes."""
    where = tmp_path_factory.mktemp("spice_files")
    demo = (ROOT / "scenarios" / "demo_pixel.toml").read_text()
    demo = demo.replace("duration_s = 1.0e-4", "duration_s = 2.0e-5").replace(
        "samples = 8192", "samples = 2048")
    ds = grmc.run(grmc.load_scenario(text=demo), trajectories=16, workers=1, progress=False)
    out = {"demo": dataset.save(ds, where / "demo.nc")}
    for name, dark in (("junction", False), ("dark", True)):
        ds = exact_dataset(grmc.load_scenario(text=_junction_text(dark)))
        out[name] = dataset.save(ds, where / f"{name}.nc")
    return out


def _curve(path: Path, source=None):
    ds = dataset.load(path)
    return export_curve(ds, spectrum_table(ds), source=source)


def _export(path: Path, out: Path, *extra: str) -> str:
    assert main(["export", str(path), "--format", "spice", "-o", str(out), *extra]) == 0
    return out.read_text()


def _elements(text: str) -> dict[str, list[str]]:
    return {ln.split()[0]: ln.split() for ln in text.splitlines()
            if ln and ln[0] in "RCG"}


# --------------------------------------------------------------------------------------------
# Closed forms, no simulator
# --------------------------------------------------------------------------------------------
def test_bank_element_values_follow_nyquist():
    # one Lorentzian: g^2 4kTR = S0 and 1/(2 pi R C) = f_c (Nyquist 1928; RC low-pass)
    spec = rational.RationalSpectrum(3e-25, [2e5], [4e-22])
    el = _elements(spice.subcircuit(spec, "one", ["t"]))
    kT4 = 4 * spice.BOLTZMANN_J_K * spice.NOISE_TEMPERATURE_K
    r, c, g = float(el["Rl1"][3]), float(el["Cl1"][3]), float(el["Gl1"][5])
    assert el["Rl1"][4] == "temp=27"
    assert g**2 * kT4 * r == pytest.approx(4e-22, rel=1e-9)
    assert 1 / (2 * math.pi * r * c) == pytest.approx(2e5, rel=1e-9)
    rw, gw = float(el["Rw"][3]), float(el["Gw"][5])
    assert gw**2 * kT4 * rw == pytest.approx(3e-25, rel=1e-9)


def test_spectral_factor_against_scipy():
    # a white level with a dip (negative plateau): not a positive sum of Lorentzians
    spec = rational.RationalSpectrum(1.0, [1e3, 3e5, 2e8], [-0.7, 0.4, -0.05])
    fac = rational.spectral_factor(spec)
    f = np.logspace(-1, 11, 400)
    # |H|^2 = S (closed form of the rational spectrum)
    np.testing.assert_allclose(np.abs(fac(f)) ** 2, spec(f), rtol=1e-9)
    # minimum phase: every zero in the closed left half-plane
    assert np.all(fac.zeros.real <= 0)
    # the same zeros and poles evaluated by scipy give the same shape (up to the gain)
    _, h = signal.freqs_zpk(fac.zeros, -fac.rates, 1.0, worN=2 * np.pi * f)
    ratio = np.abs(h) ** 2 / spec(f)
    np.testing.assert_allclose(ratio / ratio[0], 1.0, rtol=1e-8)


def test_spectral_factor_over_many_decades():
    # positive rational spectra with up to seven corners spread over eleven decades and
    # plateaus of both signs (fixed seed): |H|^2 equals the closed form everywhere, zeros and
    # poles in the left half-plane; a white level of 0 (no shot noise) too
    rng = np.random.default_rng(5)
    checked = 0
    while checked < 25:
        k = int(rng.integers(2, 8))
        spec = rational.RationalSpectrum(float(rng.choice([0.0, 1.0])),
                                         np.sort(10 ** rng.uniform(0, 11, k)),
                                         rng.uniform(-1, 1, k) * 3)
        f = np.logspace(-3, 14, 700)
        if spec.white == 0 and np.sum(spec.amplitudes * spec.corners**2) <= 0:
            continue  # no white level: S ~ sum a_k f_k^2 / f^2 at high f must be > 0
        if np.min(spec(f)) <= 1e-6 * np.max(np.abs(spec(f))):
            continue  # not a positive spectrum: no factor exists
        fac = rational.spectral_factor(spec)
        np.testing.assert_allclose(np.abs(fac(f)) ** 2, spec(f), rtol=1e-8)
        assert np.all(fac.zeros.real <= 0)
        checked += 1


def test_lna_rational_reproduces_the_files_linear_noise(files):
    # the rational form recomputed from the scenario text equals the file's current_psd_lna
    # (same theory, grmc.readout), to the check tolerance of lna_rational
    for name in ("demo", "junction", "dark"):
        ds = dataset.load(files[name])
        cur = _curve(files[name], "lna")
        np.testing.assert_allclose(cur.rational(ds.frequency.values),
                                   ds.current_psd_lna.values, rtol=1e-5)
    # the demo pixel's drift current has two corners, the dark junction's net current falls
    # towards low frequencies (negative plateaus): the two kinds of circuit
    assert _curve(files["demo"], "lna").rational.corners.size == 2
    dark = _curve(files["dark"], "lna").rational
    assert not dark.is_positive_sum and dark(1.0) < 0.5 * dark.white


# --------------------------------------------------------------------------------------------
# ngspice, for real
# --------------------------------------------------------------------------------------------
@needs_ngspice
def test_rc_lorentzian_identity_in_ngspice(tmp_path):
    # ngspice's noise of the RC stage against g^2 4kTR / (1 + (2 pi f R C)^2) (Nyquist 1928)
    # at T = 300.15 K (27 deg C).  ngspice's output differs from this by 3.5e-7 at every
    # point (measured; the ratio of the 2019 SI Boltzmann constant to the CODATA 2014 value
    # 1.38064852e-23), so 1e-4 holds; the resistor at 300 K instead of 300.15 K would be off
    # by 5e-4.
    spec = rational.RationalSpectrum(0.0, [1e6], [1e-24])
    path = tmp_path / "rc.cir"
    text = spice.subcircuit(spec, "rc", ["RC stage"])
    path.write_text(text)
    el = _elements(text)
    r, c, g = float(el["Rl1"][3]), float(el["Cl1"][3]), float(el["Gl1"][5])
    f, s = noise_analysis(path, "rc", tmp_path)
    kT4 = 4 * spice.BOLTZMANN_J_K * spice.NOISE_TEMPERATURE_K
    expected = g**2 * kT4 * r / (1 + (2 * np.pi * f * r * c) ** 2)
    assert f[0] == pytest.approx(1.0) and f[-1] == pytest.approx(1e11)
    np.testing.assert_allclose(s, expected, rtol=1e-4)


@needs_ngspice
def test_white_shot_level_in_ngspice(tmp_path):
    current = 1e-9  # A
    spec = rational.RationalSpectrum(2 * ELEMENTARY_CHARGE_C * current, [], [])
    path = tmp_path / "shot.cir"
    path.write_text(spice.subcircuit(spec, "shot", ["shot noise of 1 nA"]))
    f, s = noise_analysis(path, "shot", tmp_path)
    # 2qI (Schottky 1918) at every analysis point, 1 Hz .. 100 GHz
    np.testing.assert_allclose(s, 2 * ELEMENTARY_CHARGE_C * current, rtol=ROUND_TRIP)


@needs_ngspice
@pytest.mark.parametrize("name, source", [("demo", None), ("demo", "lna"), ("demo", "mc"),
                                          ("junction", None), ("dark", None)])
def test_ngspice_reproduces_the_export(files, tmp_path, name, source):
    extra = [] if source is None else ["--source", source]
    out = tmp_path / f"{name}.cir"
    text = _export(files[name], out, *extra)
    subckt = re.search(r"^\* subckt: (\S+)$", text, re.MULTILINE).group(1)
    assert re.search(rf"^\.subckt {subckt} p n$", text, re.MULTILINE)
    cur = _curve(files[name], source)
    if source is None:  # default: the fit where it passed (the run), else linear noise
        assert cur.source == ("fit" if name == "demo" else "lna")
    stated = _stated_spectrum(text)  # the header's "circuit spectrum"
    if cur.rational is not None:  # fit and lna: the circuit's spectrum is the curve itself
        grid = np.geomspace(1.0, 1e11, 45)
        np.testing.assert_allclose(stated(grid), cur(grid), rtol=1e-6)
    if name == "dark":
        assert "spectral factor" in text
    f, s = noise_analysis(out, subckt, tmp_path)
    assert f[0] == pytest.approx(1.0) and f[-1] == pytest.approx(1e11) and f.size == 111
    np.testing.assert_allclose(s, stated(f), rtol=ROUND_TRIP)


def _stated_spectrum(text: str) -> rational.RationalSpectrum:
    """Parse '* circuit spectrum: white c +a / (1 + (f/fc Hz)^2) ...' from the header."""
    line = re.search(r"^\* circuit spectrum: (.*) \[A\^2/Hz\]$", text, re.MULTILINE).group(1)
    white = float(re.match(r"white (\S+)", line).group(1))
    terms = re.findall(r"([-+]\S+) / \(1 \+ \(f/(\S+) Hz\)\^2\)", line)
    return rational.RationalSpectrum(white, [float(t[1]) for t in terms],
                                     [float(t[0]) for t in terms])


def test_bad_requests_exit_2_naming_the_option(files, tmp_path, capsys):
    out = tmp_path / "x.cir"
    cases = [
        # a count is not a current: no SPICE current source from it
        (["--quantity", "electrons"], "--quantity"),
        # beyond what any source of the file holds
        (["--band", "1:1e13"], "--band"),
        (["--band", "1e6:1e3"], "--band"),
        (["--band", "wide"], "--band"),
    ]
    for extra, option in cases:
        argv = ["export", str(files["demo"]), "--format", "spice", "-o", str(out), *extra]
        assert main(argv) == 2
        err = capsys.readouterr().err.strip()
        assert option in err and str(files["demo"]) in err and "Traceback" not in err
        assert len(err.splitlines()) == 1
    # an exact solution holds no Lorentzian fit
    assert main(["export", str(files["junction"]), "--format", "spice", "--source", "fit",
                 "-o", str(out)]) == 2
    assert "--source" in capsys.readouterr().err
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_verilog_a_and_csv_of_real_files(files, tmp_path):
    # Verilog-A of the demo run over the default band: the table read back with the parser
    # keeps the LRM 2.4 section 4.6.4.3 rules (pairs, frequencies ascending and unique, PSD
    # >= 0, Hz and A^2/Hz stated) and holds the exported curve (the stored fit) at 1 Hz and
    # 100 GHz, far outside the simulated band
    va = tmp_path / "demo.va"
    assert main(["export", str(files["demo"]), "--format", "verilog-a", "-o", str(va)]) == 0
    f, s = read_noise_table(va)
    assert np.all(np.diff(f) > 0) and np.all(s >= 0) and f.size == 11 * 20 + 1
    assert f[0] == pytest.approx(1.0) and f[-1] == pytest.approx(1e11)
    cur = _curve(files["demo"])
    np.testing.assert_allclose(s, cur(f), rtol=1e-9)
    text = va.read_text()
    assert "(frequency [Hz], PSD [A^2/Hz]) pairs" in text and "source: fit" in text
    assert "largest deviation of the exported curve from the Monte Carlo estimate" in text
    # CSV of the dark junction's exact file: simulated rows carry the exact spectrum,
    # extended rows the linear-noise curve, which falls towards low frequency
    csv = tmp_path / "dark.csv"
    assert main(["export", str(files["dark"]), "--format", "csv", "-o", str(csv)]) == 0
    lines = csv.read_text().splitlines()
    rows = [ln.split(",") for ln in lines if not ln.startswith("#")]
    head, body = rows[0], rows[1:]
    assert head == ["frequency_Hz", "psd", "psd_low", "psd_high", "psd_lna", "psd_export",
                    "region"]
    region = np.array([r[-1] for r in body])
    vals = np.array([[float(x) for x in r[:-1]] for r in body])
    assert set(region) == {"simulated", "extended"}
    ext = region == "extended"
    assert np.all(np.isnan(vals[ext, 1])) and np.all(np.isfinite(vals[~ext, 1]))
    np.testing.assert_allclose(vals[ext, 5], vals[ext, 4], rtol=1e-6)  # lna source = lna
    assert vals[0, 5] < 0.5 * vals[-1, 5]  # 1 Hz well below the white level at 100 GHz
