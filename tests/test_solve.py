"""The method chooser (grmc.solve): exact where the state space fits, linear noise where the
predicted next-order error is small and no count is, the files each branch writes.

References named beside each check: the reversible pair reaction's exact Bessel law (Darvey,
Ninham & Staff, J. Chem. Phys. 45, 2145, 1966; grmc.exact.pair_reaction_exact), the
linear-noise covariance of a linear birth-death process grown from a sharp start,
var(t) = var (1 - exp(-2 t / tau)) (van Kampen, Stochastic Processes in Physics and
Chemistry, 2007, ch. X; common practice).  The Monte Carlo branch is not run here.
"""

from __future__ import annotations

import numpy as np
import pytest
from birth_death import RESERVOIR_BOX

import grmc
from grmc import continuum, exact
from grmc.dataset import load, save
from grmc.exact import pair_reaction_exact
from grmc.linear_noise_output import covariance_from_zero
from grmc.solve import choose_method, solve_exact, solve_linear_noise


def pair_text(mean: float, vol: float = 1.0e-15) -> str:
    return f"""
title = "pair reaction, {mean:g} pairs"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = {mean / vol}
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = {vol}
[run]
trajectories = 8
duration_s = 1.0e-6
samples = 64
"""


def test_a_scenario_that_fits_is_solved_exactly(tmp_path):
    """Ten pairs: a few hundred states, so the master equation; the file's mean and variance
    are Darvey, Ninham & Staff's Bessel law (to the solver's 1e-10 truncation), with the
    method, its reason (the state count and the limit) and the accuracy target."""
    scen = grmc.load_scenario(text=pair_text(10.0))
    method, reason = choose_method(scen, 0.05)
    assert method == "exact"
    assert "states" in reason and "200,000" in reason
    ds = solve_exact(scen, accuracy=0.05, reason=reason)
    assert ds.attrs["method"] == "exact" and ds.attrs["method_reason"] == reason
    assert ds.attrs["accuracy_target"] == 0.05
    mean_h, var_h = pair_reaction_exact(100.0, 0)
    assert float(ds["stationary_mean"][1]) == pytest.approx(mean_h, rel=1e-9)
    assert float(ds["stationary_var"][1]) == pytest.approx(var_h, rel=1e-8)
    save(ds, tmp_path / "exact.nc")
    assert load(tmp_path / "exact.nc").attrs["method"] == "exact"


def test_a_huge_volume_goes_to_linear_noise_with_the_predicted_error(tmp_path):
    """A million pairs: far beyond the state-space limit, the predicted next-order error
    (1/4 count in 1e6) far below accuracy/5, no small count: linear noise, and the reason
    names the predicted error.  The file's mean (continuum plus the correction) is the Bessel
    law's to 1e-12 and its variance to 1e-6 (Darvey, Ninham & Staff 1966)."""
    scen = grmc.load_scenario(text=pair_text(1.0e6))
    method, reason = choose_method(scen, 0.05)
    assert method == "linear-noise"
    assert "predicted next-order error" in reason and "accuracy/5 = 0.01" in reason
    assert "exceed" in reason and "200,000" in reason
    ds = solve_linear_noise(scen, accuracy=0.05, reason=reason)
    assert ds.attrs["method"] == "linear-noise" and ds.attrs["method_reason"] == reason
    mean_h, var_h = pair_reaction_exact(1.0e12, 0)
    assert float(ds["stationary_mean"][1]) == pytest.approx(mean_h, rel=1e-12)
    assert float(ds["stationary_var"][1]) == pytest.approx(var_h, rel=1e-6)
    assert float(ds["mean_next_order"][1]) == pytest.approx(-0.25, rel=1e-9)
    for name in ("steady_continuum", "var_lna", "psd", "psd_lna", "count_mean", "count_var"):
        assert name in ds, name
    save(ds, tmp_path / "lna.nc")
    back = load(tmp_path / "lna.nc")
    assert back.attrs["accuracy_target"] == 0.05


def test_the_state_limit_decides_between_exact_and_the_rest():
    """Sixteen pairs with a limit of 10 states: not exact; the predicted error (1/4 of 16
    counts = 1.56 %) is above accuracy/5 = 1 %, so not linear noise either."""
    scen = grmc.load_scenario(text=pair_text(16.0))
    method, reason = choose_method(scen, 0.05, max_states=10)
    assert method == "monte-carlo"
    assert "0.0156 of the mean" in reason
    # with a loose accuracy (50 %: accuracy/5 = 10 %) the counts decide: sixteen pairs meet
    # each other in the recombination law, but sixteen is not a small count
    method, reason = choose_method(scen, 0.5, max_states=10)
    assert method == "linear-noise", reason


def test_a_small_count_the_answer_depends_on_refuses_linear_noise():
    """One pair on average (electrons and holes meet in the recombination law and fluctuate
    by 100 %): Monte Carlo, the reason names the small count, whatever the accuracy."""
    scen = grmc.load_scenario(text=pair_text(1.0))
    method, reason = choose_method(scen, 0.9, max_states=1)
    assert method == "monte-carlo"
    assert "smallest count the answer depends on" in reason and "radiative" in reason


def test_bad_accuracy_is_refused():
    scen = grmc.load_scenario(text=pair_text(10.0))
    for bad in (0.0, 1.0, -0.1):
        with pytest.raises(ValueError):
            choose_method(scen, bad)


def test_linear_noise_covariance_grows_as_a_birth_death_from_a_sharp_start():
    """Linear birth-death (generation, reservoir exchange, loss N_e/t_x): the linear-noise
    variance from a sharp start is var (1 - exp(-2 t / t_x)) (van Kampen 2007, ch. X)."""
    model = grmc.build_model(grmc.load_scenario(text=RESERVOIR_BOX))
    lna = continuum.lna(model)
    t = np.linspace(0.0, 5.0e-7, 51)
    var = np.einsum("tii->ti", covariance_from_zero(lna, t))[:, 0]
    expected = lna.covariance[0, 0] * (1.0 - np.exp(-2.0 * t / 1.0e-7))
    np.testing.assert_allclose(var, expected, rtol=1e-9, atol=1e-12)
    # and the exact (Poisson) stationary variance equals it at long times
    assert exact.solve(model).var[0] == pytest.approx(lna.covariance[0, 0], rel=1e-9)


# ------------------------------------------------------------------ the size ladder
LADDER = "scenarios/size_ladder.toml"


def ladder(volume: float):
    from grmc.sweep import point_scenario

    return point_scenario(grmc.load_scenario(LADDER), {"volume.volume_cm3": volume})


def test_ladder_small_end_exact_agrees_with_a_fixed_monte_carlo_run():
    """1e-16 cm^3 (one electron, a hundred holes): the master equation is chosen; its mean
    and variance of every count agree with a fixed Monte Carlo run (seed 5, 16 trajectories)
    within 3 of the run's standard errors (tolerance from the estimator's standard error)
    and the run's 95 % half-width is inside the 5 % target where it resolves the value."""
    from grmc.simulate import run
    from grmc.solve import solve

    scen = ladder(1.0e-16)
    ds = solve(scen, 0.05, progress=False)
    assert ds.attrs["method"] == "exact"
    mc = run(scen, trajectories=16, seed=5, progress=False, workers=1)
    for name in ("stationary_mean", "stationary_var"):
        ref, err = mc[name].values, mc[name + "_stderr"].values
        for s in range(2):  # electrons, holes
            assert abs(float(ds[name][s]) - ref[s]) <= 3.0 * err[s], (name, s)


def test_ladder_middle_monte_carlo_agrees_with_the_master_equation():
    """1e-16 cm^3 with the state limit at 100: the chooser runs Monte Carlo (the reason
    names the small trapped count); its means and variances to +-20 % (fast variant of the
    5 % ladder target) agree with the master equation, solved independently at the same
    rung, within 3 standard errors of the run (tolerance from the estimator's standard
    error)."""
    from grmc.solve import choose_method, solve

    scen = ladder(1.0e-16)
    method, reason = choose_method(scen, 0.2, max_states=100)
    assert method == "monte-carlo" and "trapped:midgap" in reason
    ds = solve(scen, 0.2, max_states=100, seed=3, workers=1, progress=False)
    assert ds.attrs["method"] == "monte-carlo" and ds.attrs["accuracy_target"] == 0.2
    assert "mean_next_order" in ds
    ref = exact.solve(grmc.build_model(scen))
    for name, exact_value in (("stationary_mean", ref.mean), ("stationary_var", ref.var)):
        for s in range(2):
            err = float(ds[name + "_stderr"][s])
            assert abs(float(ds[name][s]) - exact_value[s]) <= 3.0 * err, (name, s)


def test_ladder_large_end_linear_noise_against_scipy():
    """1e-12 cm^3 (ten thousand electrons, a million holes): linear noise, and the reason
    names the predicted error.  Reference computed here with scipy, independent of
    grmc.continuum: the steady state by integrating the rate equations (solve_ivp, Radau)
    and the covariance from the Lyapunov equation A C + C A^T + D = 0 (van Kampen 2007,
    ch. X) in the coordinates left after eliminating the holes through the charge, with A
    by central differences of the model's rates; the answer agrees to the 5 % target (and
    in fact to 1e-4)."""
    import scipy.integrate
    import scipy.linalg

    from grmc.solve import choose_method, solve

    scen = ladder(1.0e-12)
    method, reason = choose_method(scen, 0.05)
    assert method == "linear-noise" and "predicted next-order error" in reason
    ds = solve(scen, 0.05)
    model = grmc.build_model(scen)
    nu = np.asarray(model.stoich, dtype=float)          # (channels, species)
    w = np.asarray(model.charge_weights, dtype=float)   # holes have weight -1

    def full(y):  # electrons, trapped -> all three counts at the model's charge
        return np.array([y[0], (w[0] * y[0] + w[2] * y[1] - model.charge) / -w[1], y[1]])

    def rhs(t, y):
        return (nu.T @ model.rates(full(y)))[[0, 2]]

    x0 = np.asarray(ds["steady_continuum"].values, dtype=float)
    sol = scipy.integrate.solve_ivp(rhs, (0.0, 1.0e-6), x0[[0, 2]] * 1.1, method="Radau",
                                    rtol=1e-10, atol=1e-6)
    y = sol.y[:, -1]
    assert np.allclose(full(y), ds["stationary_mean"].values, rtol=1e-4)
    h = 1e-4 * np.maximum(y, 1.0)
    a = np.column_stack([(rhs(0, y + h[j] * np.eye(2)[j]) - rhs(0, y - h[j] * np.eye(2)[j]))
                         / (2 * h[j]) for j in range(2)])
    red = nu[:, [0, 2]]
    d = red.T @ (model.rates(full(y))[:, None] * red)
    c = scipy.linalg.solve_continuous_lyapunov(a, -d)
    got = ds["stationary_var"].values
    assert got[0] == pytest.approx(c[0, 0], rel=1e-4)
    assert got[2] == pytest.approx(c[1, 1], rel=1e-4)
    for name in ("psd_band", "psd_band_low", "current_psd_band", "current_noise_rms",
                 "mean_next_order"):
        assert name in ds, name
    np.testing.assert_array_equal(ds["psd_band_low"].values, ds["psd_band"].values)


# ------------------------------------------------------------------ grmc solve (CLI)
def _cli(*args):
    import subprocess
    import sys

    return subprocess.run([sys.executable, "-m", "grmc", *args], capture_output=True,
                          text=True)


def test_cli_solve_writes_the_method_and_its_reason(tmp_path):
    """The method is printed on one line before the table; the file carries the method,
    its reason and the target, the band-averaged spectra (computed: low = high, said in the
    variable's comment) and the next-order correction; plot and export read it (common
    practice: the output contract of docs/file-format.md)."""
    out = tmp_path / "ladder.nc"
    proc = _cli("solve", LADDER, "--accuracy", "0.05", "--set", "volume.volume_cm3=1e-18",
                "-o", str(out))
    assert proc.returncode == 0, proc.stderr
    first = proc.stdout.splitlines()[0]
    assert first.startswith("method: exact, because the master equation fits")
    ds = load(out)
    assert ds.attrs["method"] == "exact" and ds.attrs["accuracy_target"] == 0.05
    assert ds.attrs["method_reason"] in first
    assert ds.attrs["volume_cm3"] == 1.0e-18
    assert "no sampling interval" in ds["psd_band_high"].attrs["comment"]
    for name in ("mean_next_order", "frequency_band", "current_noise_rms"):
        assert name in ds.variables, name
    plot = _cli("plot", str(out), "-o", str(tmp_path / "fig"))
    assert plot.returncode == 0, plot.stderr
    export = _cli("export", str(out), "--format", "spice", "-o", str(tmp_path / "n.cir"))
    assert export.returncode == 0, export.stderr
    assert (tmp_path / "n.cir").exists()


@pytest.mark.parametrize("args, option", [
    (("--accuracy", "0"), "--accuracy"),
    (("--accuracy", "1.5"), "--accuracy"),
    (("--accuracy", "0.05", "--band", "1e6:1e3"), "--band"),
    (("--accuracy", "0.05", "--band", "1e3:1e3"), "--band"),
    (("--accuracy", "0.05", "--set", "volume.volume_cm3"), "--set"),
    (("--accuracy", "0.05", "--set", "volume.nothing=1"), "nothing"),
])
def test_cli_solve_bad_values_exit_2_naming_the_option(tmp_path, args, option):
    """Bad input: one line on stderr naming the option, exit status 2, no file (common
    practice; README, exit status)."""
    out = tmp_path / "bad.nc"
    proc = _cli("solve", LADDER, *args, "-o", str(out))
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and option in lines[0], proc.stderr
    assert not out.exists()


# ------------------------------------------------------------------ the chooser in sweeps
def test_sweep_points_use_the_chooser_and_the_figure_draws_the_prediction():
    """Two sweep points of the pair reaction: ten pairs (the master equation fits) and a
    million (linear noise, its mean the continuum plus the -1/4 correction of Darvey, Ninham
    & Staff 1966's large-count limit); the method and the reason are recorded per point,
    and the validity figure draws the predicted deviation |mean_next_order / continuum|
    beside the measured one."""
    from grmc.plotting import plot_validity
    from grmc.sweep import Vary, assemble, evaluate_point, point_scenario

    base = grmc.load_scenario(text=pair_text(10.0))
    results = []
    for i, vol in enumerate((1.0e-15, 1.0e-10)):
        res = evaluate_point(point_scenario(base, {"volume.volume_cm3": vol}), i)
        res["assignment"] = {"volume.volume_cm3": vol}
        results.append(res)
    assert [r["method"] for r in results] == ["exact", "linear-noise"]
    assert "fits" in results[0]["method_reason"]
    assert "predicted next-order error" in results[1]["method_reason"]
    h = results[1]["species"].index("holes")
    assert results[1]["mean"][h] == pytest.approx(1.0e6 - 0.25, rel=1e-12)
    vary = Vary("volume.volume_cm3", (1.0e-15, 1.0e-10))
    ds = assemble(base, [vary], results)
    assert list(ds["method"].values) == ["exact", "linear-noise"]
    assert ds["mean_next_order"].shape == (2, 2)  # sweep, species (electrons, holes)
    ax = plot_validity(ds, "mean")
    labels = [line.get_label() for line in ax.get_lines()]
    assert any("predicted" in lab for lab in labels), labels
