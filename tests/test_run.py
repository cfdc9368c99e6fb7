"""`grmc run`: the ensemble against exact results, reproducibility and the output file.

Statistical tolerances: every Monte Carlo estimate is compared with its reference through the
standard error the run itself reports (spread of per-trajectory time averages over
sqrt(trajectories)), with fixed seeds.  A z-score bound of 4 is used where one value is
checked (two-sided p = 6e-5), so a correct engine fails by chance about once in 16000 runs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from birth_death import birth_death_box
from scipy import stats

import grmc
from grmc.exact import pair_reaction_exact

Z = 4.0  # z-score bound, see the module docstring


def _scenario(text: str) -> grmc.Scenario:
    return grmc.load_scenario(text=text)


def birth_death_text(trajectories=64, duration=5.0e-3, seed=3):
    return birth_death_box(more=f"""
[run]
trajectories = {trajectories}
duration_s = {duration}
samples = 512
settle_s = 5.0e-4
seed = {seed}
""")


def test_birth_death_is_poisson():
    """Stationary law of a linear birth-death process is Poisson: var = mean, and the
    occupation probabilities are the Poisson pmf (e.g. van Kampen, Stochastic Processes in
    Physics and Chemistry, ch. VI; common practice)."""
    ds = grmc.run(_scenario(birth_death_text()), workers=2, progress=False)
    mean = float(ds["stationary_mean"].sel(species="electrons"))
    err = float(ds["stationary_mean_stderr"].sel(species="electrons"))
    var = float(ds["stationary_var"].sel(species="electrons"))
    var_err = float(ds["stationary_var_stderr"].sel(species="electrons"))
    g = 1.0e20 * 1.0e-15 + 1.0e-16 * 1.0e12 * 1.0e-15  # G V + B n_i^2 V [1/s]
    k = 1.0e-16 * (1.0e5 + mean) / 1.0e-15  # B N_h / V [1/s]; mean g/k ~ 10
    assert abs(mean - g / k) < Z * err  # birth-death mean g/k
    assert abs(var - mean) < Z * math.hypot(var_err, err)  # Poisson: var = mean
    # occupation probabilities against the Poisson pmf, within the binomial standard error
    # of a proportion estimated from n_eff independent looks (one per relaxation time).
    hist = ds["count_histogram"].sel(species="electrons")
    values = ds["count_value"].values
    pmf = stats.poisson.pmf(values, mean)
    n_eff = ds.attrs["trajectories"] * ds.attrs["duration_s"] * k
    sel = pmf > 0.02
    se = np.sqrt(pmf[sel] * (1 - pmf[sel]) / n_eff) * 2.0  # x2: correlated samples in a bin
    assert np.all(np.abs(hist.values[sel] - pmf[sel]) < Z * se)


def pair_text(donors_cm3: float, seed: int = 11):
    # Intrinsic material with band-to-band processes only: lambda = g/k = n_i^2 V^2 = 4
    # (n_i V = 2), so only a few carriers are present and the continuum is far off.
    return f"""
title = "pair reaction"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
donors_cm3 = {donors_cm3}
[volume]
volume_cm3 = 2.0e-10
[run]
trajectories = 128
duration_s = 40.0
samples = 256
settle_s = 5.0
seed = {seed}
"""


@pytest.mark.parametrize("donors", [0, 3])
def test_pair_reaction_bessel(donors):
    """Reversible pair reaction e + h <-> 0: exact stationary mean and variance of N_h
    (Darvey, Ninham & Staff, J. Chem. Phys. 45, 2145, 1966), lambda = 4, d = 0 and 3."""
    ds = grmc.run(_scenario(pair_text(donors * 0.5e10)), workers=2, progress=False)
    lam, d = 4.0, donors
    mean_h, var_h = pair_reaction_exact(lam, d)
    h = ds.sel(species="holes")
    assert abs(float(h["stationary_mean"]) - mean_h) < Z * float(h["stationary_mean_stderr"])
    assert abs(float(h["stationary_var"]) - var_h) < Z * float(h["stationary_var_stderr"])
    # and the continuum answer is far off here (the reason the volume was chosen)
    cont = (-d + math.sqrt(d * d + 4 * lam)) / 2
    assert abs(cont - mean_h) > 10 * float(h["stationary_mean_stderr"])


def trap_text(count=4, trajectories=64, duration=2.0e-5, light=0.0, seed=5):
    return f"""
title = "few traps"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e12
radiative_cm3_s = 1.0e-10
auger_electron_cm6_s = 1.0e-28
auger_hole_cm6_s = 1.0e-28
donors_cm3 = 3.0e15
[volume]
volume_cm3 = 1.0e-14
[[traps]]
label = "deep"
count = {count}
energy_eV = 0.05
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 3.0e-8
[light]
generation_cm3_s = {light}
[run]
trajectories = {trajectories}
duration_s = {duration}
samples = 512
settle_s = 2.0e-6
seed = {seed}
"""


DARK = """
title = "dark box, every reverse pair active"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e15
radiative_cm3_s = 1.0e-10
auger_electron_cm6_s = 1.0e-26
auger_hole_cm6_s = 1.0e-26
donors_cm3 = 2.0e14
[volume]
volume_cm3 = 1.0e-14
[[traps]]
label = "deep"
count = 4
energy_eV = 0.02
kind = "donor"
electron_capture_cm3_s = 1.0e-9
hole_capture_cm3_s = 2.0e-9
[run]
trajectories = 64
duration_s = 1.0e-4
samples = 256
settle_s = 1.0e-5
seed = 8
"""


def test_detailed_balance_in_the_dark():
    """In equilibrium each channel and its reverse fire equally often (detailed balance;
    docs/physics-notes.md).  The difference of two event counts of a reverse pair is bounded by the
    state's excursions, so the Poisson error sqrt(f + r) of independent counts is a
    conservative standard error for it."""
    scen = _scenario(DARK)
    ds = grmc.run(scen, workers=2, progress=False)
    model = grmc.build_model(scen)
    ev = ds["events"].values
    assert model.reverse_pairs, "the model must have reverse pairs"
    for f, r in model.reverse_pairs:
        assert ev[f] + ev[r] > 500, model.channel_names[f]
        assert abs(ev[f] - ev[r]) < Z * math.sqrt(ev[f] + ev[r]), model.channel_names[f]


def test_exact_master_equation_agreement():
    """Monte Carlo stationary mean and variance equal the exact master-equation values on a
    small system with one trap level of a few traps (finite state projection, Munsky &
    Khammash, J. Chem. Phys. 124, 044104, 2006), within the run's standard errors."""
    from grmc.exact import solve

    scen = _scenario(trap_text(light=3.0e18))
    ds = grmc.run(scen, workers=2, progress=False)
    ex = solve(grmc.build_model(scen))
    for i, s in enumerate(ds["species"].values):
        m, e = float(ds["stationary_mean"][i]), float(ds["stationary_mean_stderr"][i])
        v, ve = float(ds["stationary_var"][i]), float(ds["stationary_var_stderr"][i])
        assert abs(m - ex.mean[i]) < Z * e, s
        assert abs(v - ex.var[i]) < Z * ve, s


def test_pulse_decays_with_srh_lifetime():
    """Excess electrons in p-type material decay as exp(-t/tau) with the low-injection SRH
    lifetime tau = 1/(c_n N_t) (common practice; docs/physics-notes.md: sigma = 1e-15 cm^2,
    v_th = 1e7 cm/s, N_t = 1e15 cm^-3 gives 100 ns).  Each ensemble mean is compared with
    its standard error sqrt(var/n) at 16 times (Bonferroni: P(any |z| > 4) < 1e-3)."""
    text = """
title = "pulse"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
acceptors_cm3 = 1.0e18
[volume]
volume_cm3 = 1.0e-12
[[traps]]
label = "srh"
density_cm3 = 1.0e15
energy_eV = 0.0
electron_cross_section_cm2 = 1.0e-15
hole_cross_section_cm2 = 1.0e-15
thermal_velocity_cm_s = 1.0e7
[start]
excess_pairs = 40
[run]
trajectories = 256
duration_s = 4.0e-7
samples = 256
seed = 21
"""
    ds = grmc.run(_scenario(text), workers=2, progress=False)
    tau = 1.0 / (1.0e-15 * 1.0e7 * 1.0e15)  # 100 ns
    e = ds.sel(species="electrons")
    n = ds.attrs["trajectories"]
    t = ds["t"].values
    idx = np.linspace(0, len(t) - 1, 16).astype(int)
    expected = 40.0 * np.exp(-t[idx] / tau)  # equilibrium electrons: n_i^2 V / A ~ 1e-4
    mean = e["count_mean"].values[idx]
    se = np.sqrt(np.maximum(e["count_var"].values[idx], expected) / n)
    z = (mean - expected) / se
    assert np.all(np.abs(z) < Z), z


def test_same_seed_same_data_any_workers(tmp_path):
    """Identical file data with 1 and 2 workers (streams spawned from (seed, trajectory))."""
    scen = _scenario(trap_text(trajectories=6, duration=2.0e-6))
    a = grmc.run(scen, workers=1, progress=False)
    b = grmc.run(scen, workers=2, progress=False)
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    c = grmc.run(scen, workers=2, progress=False, seed=99)
    assert not np.array_equal(a["count_mean"].values, c["count_mean"].values)


def test_output_file_round_trip_and_cf(tmp_path):
    """The written file loads back with the same data and passes the IOOS compliance
    checker's CF 1.11 suite with no errors."""
    from grmc.dataset import load, save

    scen = _scenario(trap_text(trajectories=4, duration=2.0e-6).replace(
        "[run]", "[readout]\nbias_V = 0.5\nlength_cm = 1.0e-4\nelectron_mobility_cm2_Vs = 1000.0\n"
        "hole_mobility_cm2_Vs = 300.0\n[run]"))
    ds = grmc.run(scen, workers=2, progress=False)
    path = save(ds, tmp_path / "run.nc")
    back = load(path)
    for name in ("count_mean", "psd", "psd_lna", "events", "current_psd", "current_mean"):
        np.testing.assert_array_equal(back[name].values, ds[name].values)
    for name in back.variables:
        assert "units" in back[name].attrs and "long_name" in back[name].attrs, name
    assert back.attrs["Conventions"] == "CF-1.11" and "scenario_toml" in back.attrs
    assert _cf_errors(path) == []


def _cf_errors(path) -> list[str]:
    """High-priority (error) results of the IOOS compliance checker's cf:1.11 suite."""
    import json

    from compliance_checker.runner import CheckSuite, ComplianceChecker

    CheckSuite.load_all_available_checkers()
    out = path.with_suffix(".json")
    ComplianceChecker.run_checker(str(path), ["cf:1.11"], 0, "normal",
                                  output_filename=str(out), output_format="json")
    report = json.loads(out.read_text())["cf:1.11"]
    return [f"{r['name']}: {r['msgs']}" for r in report.get("high_priorities", [])
            if r["value"][0] < r["value"][1]]


def test_time_slices_are_exact_and_reproducible(monkeypatch):
    """Cutting trajectories into time slices (memoryless restarts) keeps the exact law: the
    pair reaction's Bessel mean (Darvey, Ninham & Staff 1966) within the standard error, the
    charge conserved at every sample, and identical data with 1 and 2 workers."""
    import grmc.simulate as sim

    monkeypatch.setattr(sim, "SLICE_EVENTS", 5.0)  # a few dozen slices per trajectory
    scen = _scenario(pair_text(0.0, seed=13).replace("trajectories = 128",
                                                     "trajectories = 32"))
    a = grmc.run(scen, workers=1, progress=False)
    b = grmc.run(scen, workers=2, progress=False)
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    h = a.sel(species="holes")
    mean_h, _ = pair_reaction_exact(4.0, 0)
    assert abs(float(h["stationary_mean"]) - mean_h) < Z * float(h["stationary_mean_stderr"])
    plan = sim._slice_plan(sim.prepare(grmc.build_model(scen)), scen.run)
    assert plan.window_slices > 8 and plan.settle_slices > 1
    # the ensemble mean count difference e - h is the conserved charge (0) at every sample
    diff = a["count_mean"].sel(species="electrons") - a["count_mean"].sel(species="holes")
    np.testing.assert_array_equal(diff.values, 0.0)


def test_poisson_dopants_per_trajectory():
    """With dopants = "poisson" each trajectory draws its own trap and dopant counts: their
    population follows the Poisson law of the mean count per device (common practice for
    random dopant fluctuations): sample mean within 4 standard errors of the mean, and the
    dispersion index sum (k - m)^2 / m inside the chi-squared 99.9 % range."""
    text = trap_text(trajectories=200, duration=2.0e-7).replace(
        "count = 4", "density_cm3 = 3.0e14").replace('dopants = "rounded"', "")
    text = text.replace("[run]", "[run]\ndopants = \"poisson\"")
    ds = grmc.run(_scenario(text), workers=2, progress=False)
    k = ds["trap_count"].values[:, 0].astype(float)
    m = 3.0e14 * 1.0e-14  # density * V = 3 traps per device
    assert abs(k.mean() - m) < Z * math.sqrt(m / k.size)
    dispersion = ((k - m) ** 2).sum() / m
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], k.size)
    assert lo < dispersion < hi
    donors = ds["donors"].values.astype(float)
    md = 3.0e15 * 1.0e-14
    assert abs(donors.mean() - md) < Z * math.sqrt(md / donors.size)
    assert len(set(k)) > 3  # counts really differ between devices


def test_interrupt_leaves_no_file(tmp_path):
    """Ctrl-C (SIGINT) during a run stops it within seconds with exit status 130 and leaves
    neither the output file nor a temporary one."""
    import signal
    import subprocess
    import sys
    import time

    path = tmp_path / "long.toml"
    path.write_text(pair_text(0.0).replace("duration_s = 40.0", "duration_s = 4.0e8"))
    out = tmp_path / "long.nc"
    proc = subprocess.Popen([sys.executable, "-m", "grmc", "run", str(path), "-o", str(out),
                             "-q"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(6.0)
    assert proc.poll() is None, proc.communicate()
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err
    assert not out.exists() and not list(tmp_path.glob("*.part")) and \
        not list(tmp_path.glob(".*"))


def test_exact_agreement_second_scenario_dark_auger():
    """A second small scenario (dark, radiative + both Auger channels + a donor-like trap
    level): Monte Carlo stationary means and variances equal the exact master-equation values
    (Munsky & Khammash 2006) within the run's standard errors."""
    from grmc.exact import solve

    scen = _scenario(DARK)
    ds = grmc.run(scen, workers=2, progress=False)
    ex = solve(grmc.build_model(scen))
    for i, s in enumerate(ds["species"].values):
        m, e = float(ds["stationary_mean"][i]), float(ds["stationary_mean_stderr"][i])
        v, ve = float(ds["stationary_var"][i]), float(ds["stationary_var_stderr"][i])
        assert abs(m - ex.mean[i]) < Z * e, s
        assert abs(v - ex.var[i]) < Z * ve, s
