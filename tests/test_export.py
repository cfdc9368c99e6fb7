"""Tests of grmc.export: CSV tables and Verilog-A noise sources.

References: the Verilog-A form follows Accellera Verilog-AMS LRM 2.4 (2014), sections
4.6.4.3 (noise_table: (frequency, power) pairs, ascending, linear interpolation) and 4.6.4.4
(noise_table_log); the synthetic spectra are van Vliet's one-level Lorentzian (Proc. IRE 46,
1004, 1958, from memory) and the intervals Welch's chi-squared intervals (IEEE Trans. Audio
Electroacoust. 15, 70, 1967).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import xarray as xr

from grmc import export, spectra

K = 32
TAU = {"electrons": 2e-7, "holes": 2e-7, "trapped:deep": 5e-7}
VAR = {"electrons": 40.0, "holes": 40.0, "trapped:deep": 2.0}
SCENARIO = """title = "test bar"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
[readout]
bias_V = 1.5
length_cm = 1.0e-4
electron_mobility_cm2_Vs = 1400.0
hole_mobility_cm2_Vs = 450.0
"""


def make_dataset(*, noisy: bool = True, current: bool = True, seed: int = 0) -> xr.Dataset:
    """A small output Dataset with docs/file-format.md names: Lorentzian spectra (van Vliet) with
    chi^2_{2K}/2K scatter and Welch intervals."""
    rng = np.random.default_rng(seed)
    t_seg, n_freq = 1e-5, 1024
    f = np.arange(1, n_freq + 1) / t_seg
    species = list(TAU)
    lna = np.array([spectra.lorentzian(f, VAR[s], TAU[s]) for s in species])
    psd = lna * (rng.chisquare(2 * K, lna.shape) / (2 * K) if noisy else 1.0)
    low, high = spectra.welch_interval(psd, K)
    ds = xr.Dataset(
        {
            "psd": (("species", "frequency"), psd, {"units": "Hz-1"}),
            "psd_low": (("species", "frequency"), low, {"units": "Hz-1"}),
            "psd_high": (("species", "frequency"), high, {"units": "Hz-1"}),
            "psd_lna": (("species", "frequency"), lna, {"units": "Hz-1"}),
        },
        coords={"frequency": ("frequency", f, {"units": "Hz"}), "species": species},
        attrs={"title": "test bar", "scenario_toml": SCENARIO},
    )
    if current:
        a_e, a_h = spectra.current_scale(
            {"bias_V": 1.5, "length_cm": 1e-4, "electron_mobility_cm2_Vs": 1400.0,
             "hole_mobility_cm2_Vs": 450.0})
        # electrons and holes fully correlated here (pairs): S_I = (a_e + a_h)^2 S_ee
        ds["current_psd"] = ("frequency", (a_e + a_h) ** 2 * psd[0], {"units": "A2 Hz-1"})
        ds["current_psd_lna"] = ("frequency", (a_e + a_h) ** 2 * lna[0], {"units": "A2 Hz-1"})
        ds["current_mean"] = ((), 1e-6, {"units": "A"})
    return ds


def read_csv(path):
    lines = path.read_text().splitlines()
    header = [ln for ln in lines if ln.startswith("#")]
    # (genfromtxt would take the first comment line for the names: skip the header)
    table = np.genfromtxt(path, delimiter=",", skip_header=len(header), names=True,
                          dtype=None, encoding="utf-8")
    return header, table


#: the synthetic spectra's own band: no scenario to extend them from (export_curve refuses a
#: wider band, see test_band_beyond_the_file_is_refused)
BAND = (1e5, 1024e5)


# --------------------------------------------------------------------------------------------
def test_csv_current_default(tmp_path):
    ds = make_dataset()
    out = export.export_csv(ds, tmp_path / "spec.csv", band=BAND)
    header, tab = read_csv(out)
    text = "\n".join(header)
    assert "test bar" in text and "A^2/Hz" in text and "one-sided" in text
    assert "Welch" in text and "K = 32" in text and "1.5 V" in text
    assert tab.dtype.names == ("frequency_Hz", "psd", "psd_low", "psd_high", "psd_lna",
                               "psd_export", "region")
    assert set(tab["region"]) == {"simulated"}
    # no fit and no usable scenario text: the source is the Monte Carlo estimate itself
    assert "source: mc" in text and "largest deviation" in text
    np.testing.assert_allclose(tab["frequency_Hz"], ds.frequency, rtol=1e-10)
    np.testing.assert_allclose(tab["psd"], ds.current_psd, rtol=1e-10)
    np.testing.assert_allclose(tab["psd_lna"], ds.current_psd_lna, rtol=1e-10)
    # no current_psd_low in the file: the interval is the same relative chi^2 interval as
    # the counts' (same K), i.e. Welch's interval of the current estimate
    lo, hi = spectra.welch_interval(ds.current_psd.values, K)
    np.testing.assert_allclose(tab["psd_low"], lo, rtol=1e-9)
    np.testing.assert_allclose(tab["psd_high"], hi, rtol=1e-9)


def test_csv_species_and_errors(tmp_path):
    ds = make_dataset(current=False)
    del ds.attrs["scenario_toml"]  # bias absent: accepted, just not reported
    out = export.export_csv(ds, tmp_path / "e.csv", band=BAND)  # default: electrons
    header, tab = read_csv(out)
    assert any("counts^2/Hz" in h for h in header)
    assert not any("bias" in h for h in header)
    np.testing.assert_allclose(tab["psd"], ds.psd.sel(species="electrons"), rtol=1e-10)
    out = export.export_csv(ds, tmp_path / "t.csv", quantity="trapped:deep", band=BAND)
    _, tab = read_csv(out)
    np.testing.assert_allclose(tab["psd_high"], ds.psd_high.sel(species="trapped:deep"),
                               rtol=1e-10)
    with pytest.raises(ValueError, match="unknown quantity 'photons'.*electrons"):
        export.export_csv(ds, tmp_path / "x.csv", quantity="photons")
    with pytest.raises(ValueError, match="no current_psd"):
        export.export_csv(ds, tmp_path / "x.csv", quantity="current")
    ds.attrs["readout_bias_V"] = 0.25
    header, _ = read_csv(export.export_csv(ds, tmp_path / "b.csv", band=BAND))
    assert any("0.25 V" in h for h in header)
    # a sweep file must be reduced to one point first
    swept = xr.concat([ds, ds], dim="sweep")
    with pytest.raises(ValueError, match="isel"):
        export.export_csv(swept, tmp_path / "s.csv")
    assert not (tmp_path / "x.csv").exists() and not (tmp_path / "s.csv").exists()


@pytest.mark.parametrize("interpolation, func", [("linear", "noise_table"),
                                                 ("log", "noise_table_log")])
def test_verilog_a_inline_round_trip(tmp_path, interpolation, func):
    ds = make_dataset()
    va, tbl = export.export_verilog_a(ds, tmp_path / "bar noise.va",
                                      interpolation=interpolation, band=BAND)
    text = va.read_text()
    assert '`include "disciplines.vams"' in text
    assert re.search(r"^module bar_noise\(p, n\);$", text, re.MULTILINE)
    assert f"I(p, n) <+ {func}('{{" in text
    assert text.count("{") == text.count("}") and text.count("(") == text.count(")")
    assert text.rstrip().endswith("endmodule")
    f_va, s_va = export.read_noise_table(va)
    f_tb, s_tb = export.read_noise_table(tbl)
    np.testing.assert_array_equal(f_va, f_tb)
    np.testing.assert_array_equal(s_va, s_tb)
    # the same numbers as the resampled spectrum, to the printed precision (%.10e)
    f_ex, s_ex = export.resample_spectrum(ds.frequency.values, ds.current_psd.values)
    np.testing.assert_allclose(f_va, f_ex, rtol=1e-10)
    np.testing.assert_allclose(s_va, s_ex, rtol=1e-10)
    # LRM 2.4 4.6.4.3: ascending, unique, > 0; spanning the band at ~20 points per decade
    assert np.all(np.diff(f_va) > 0) and f_va[0] > 0
    assert f_va[0] == pytest.approx(ds.frequency[0]) and f_va[-1] == pytest.approx(
        ds.frequency[-1])
    decades = math.log10(f_va[-1] / f_va[0])
    assert f_va.size == math.ceil(20 * decades) + 1
    tbl_text = tbl.read_text()
    assert tbl_text.startswith("# grmc noise spectrum")
    assert "one-sided" in tbl_text and "A^2/Hz" in tbl_text and "1.5 V" in tbl_text


def with_stored_fit(ds: xr.Dataset) -> tuple[xr.Dataset, spectra.LorentzianFit]:
    """The Dataset with the current's Lorentzian fit stored as grmc run stores it."""
    lo, hi = spectra.welch_interval(ds.current_psd.values, K)
    res = spectra.analyse_spectrum(ds.frequency.values, ds.current_psd.values, lo, hi, K)
    assert res.kind == "one"
    (c,) = res.components
    ds = ds.copy()
    ds["current_spectrum_kind"] = ((), "one")
    ds["current_plateau"] = (("component",), [c.S0, np.nan])
    ds["current_corner_frequency"] = (("component",), [c.f_c, np.nan])
    return ds, c


def test_verilog_a_file_form_and_sources(tmp_path):
    ds = make_dataset()
    va, _tbl = export.export_verilog_a(ds, tmp_path / "n.va", table="file", source="mc",
                                      band=BAND, module_name="my_src")
    text = va.read_text()
    assert 'I(p, n) <+ noise_table("n.tbl", "my_src");' in text
    f, s = export.read_noise_table(va)  # follows the file name
    f_ex, s_ex = export.resample_spectrum(ds.frequency.values, ds.current_psd.values)
    np.testing.assert_allclose(s, s_ex, rtol=1e-10)
    # source="fit": the stored Lorentzian, over the default band 1 Hz .. 100 GHz (its tails
    # extend the simulated band), consistent with analyse_spectrum
    fitted, c = with_stored_fit(ds)
    va2, _ = export.export_verilog_a(fitted, tmp_path / "fit.va")  # default: the fit
    f2, s2 = export.read_noise_table(va2)
    assert f2[0] == pytest.approx(1.0) and f2[-1] == pytest.approx(1e11)
    np.testing.assert_allclose(s2, c.S0 / (1 + (f2 / c.f_c) ** 2), rtol=1e-9)
    head = va2.read_text()
    assert "source: fit" in head and "band: 1 .. 1e+11 Hz" in head
    # LRM 2.4 section 4.6.4.3: (frequency, power) pairs, frequencies ascending and unique,
    # power >= 0, in Hz and A^2/Hz (the header says so); about 20 points per decade
    assert np.all(np.diff(f2) > 0) and np.all(s2 >= 0) and f2.size == 11 * 20 + 1
    assert "frequency [Hz], PSD [A^2/Hz]" in head
    # the synthetic file has no scenario to recompute the linear noise from
    with pytest.raises(ValueError, match="--source"):
        export.export_verilog_a(ds, tmp_path / "l.va", source="lna")


def test_band_beyond_the_file_is_refused(tmp_path):
    ds = make_dataset()
    # neither a fit that passed nor a scenario text: nothing to extend the estimate with
    with pytest.raises(ValueError, match="--band.*outside the simulated band"):
        export.export_csv(ds, tmp_path / "x.csv")
    with pytest.raises(ValueError, match="--band"):
        export.export_csv(ds, tmp_path / "x.csv", band=(1.0, 1e13))
    with pytest.raises(ValueError, match="--source"):
        export.export_csv(ds, tmp_path / "x.csv", source="fit", band=BAND)
    assert list(tmp_path.iterdir()) == []


def test_csv_extended_rows(tmp_path):
    # the fit's tails outside the simulated band, rows marked extended, estimate nan there
    fitted, c = with_stored_fit(make_dataset())
    _, tab = read_csv(export.export_csv(fitted, tmp_path / "w.csv", band=(1e3, 1e10)))
    ext = tab["region"] == "extended"
    sim = tab["region"] == "simulated"
    assert ext.sum() == 40 + 40 and sim.sum() == fitted.frequency.size
    assert np.all(np.isnan(tab["psd"][ext])) and np.all(np.isfinite(tab["psd"][sim]))
    assert np.all(np.diff(tab["frequency_Hz"]) > 0)
    np.testing.assert_allclose(tab["psd_export"],
                               c.S0 / (1 + (tab["frequency_Hz"] / c.f_c) ** 2), rtol=1e-9)


def test_mc_resampling_reproduces_smooth_spectrum():
    # Band averaging over one grid step (1/20 decade) leaves a Lorentzian unchanged to
    # second order in the band width: within 0.5 % of the closed form; on a noisy estimate
    # it reduces the scatter of log(S/true) where the bands hold many bins.
    ds = make_dataset(noisy=False)
    f, s = export.resample_spectrum(ds.frequency.values, ds.current_psd.values)
    exact = np.interp(np.log(f), np.log(ds.frequency.values), np.log(ds.current_psd.values))
    np.testing.assert_allclose(s, np.exp(exact), rtol=5e-3)
    noisy = make_dataset(noisy=True, seed=3)
    f, s = export.resample_spectrum(noisy.frequency.values, noisy.current_psd.values)
    true = np.exp(np.interp(np.log(f), np.log(ds.frequency.values),
                            np.log(ds.current_psd.values)))
    high = f > 1e7  # bands of >= 50 bins
    raw = noisy.current_psd.values / ds.current_psd.values
    assert np.std(np.log(s[high] / true[high])) < 0.5 * np.std(np.log(raw))


def test_verilog_a_refuses_counts(tmp_path):
    ds = make_dataset()
    with pytest.raises(ValueError, match="not a current"):
        export.export_verilog_a(ds, tmp_path / "e.va", quantity="electrons")
    with pytest.raises(ValueError, match="not a current"):
        export.export_verilog_a(make_dataset(current=False), tmp_path / "e.va")
    with pytest.raises(ValueError, match="identifier"):
        export.export_verilog_a(ds, tmp_path / "e.va", module_name="9lives")
    # nothing written, no temporary files left behind
    assert list(tmp_path.iterdir()) == []


def test_atomic_replacement(tmp_path):
    # an existing file is replaced as a whole; no temporary files remain
    target = tmp_path / "spec.csv"
    target.write_text("old contents that are longer than nothing\n" * 1000)
    export.export_csv(make_dataset(), target, band=BAND)
    assert target.read_text().startswith("# grmc noise spectrum")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["spec.csv"]


def test_read_noise_table_formats(tmp_path):
    # both array-literal forms of the LRM (2.4: '{...}; older tools: {...}) parse
    va = tmp_path / "x.va"
    va.write_text('module m(p, n); electrical p, n; analog I(p, n) <+ noise_table({1e3, '
                  '2.5e-24, 1e4, 1.0e-24}, "m"); // {9, 9}\nendmodule\n')
    f, s = export.read_noise_table(va)
    np.testing.assert_array_equal(f, [1e3, 1e4])
    np.testing.assert_array_equal(s, [2.5e-24, 1e-24])
    bad = tmp_path / "bad.tbl"
    bad.write_text("# c\n1 2 3\n")
    with pytest.raises(ValueError, match="frequency power"):
        export.read_noise_table(bad)
