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
