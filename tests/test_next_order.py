"""The next-order (1/volume) correction of the means (grmc.next_order) against exact results.

References named beside each check:
- the reversible pair reaction, exact Bessel law (Darvey, Ninham & Staff, J. Chem. Phys. 45,
  2145, 1966; grmc.exact.pair_reaction_exact), whose large-count limit gives -1/4 for d = 0;
- a linear birth-death volume: the linear-noise mean is exact (van Kampen, Stochastic
  Processes in Physics and Chemistry, 2007, ch. X), so the correction is zero;
- a small trap volume: the exact master equation (grmc.exact.solve);
- the falling factorial of a three-body law: N (N - 1) - N^2 = -N (closed form).
"""

from __future__ import annotations

import numpy as np
import pytest
from birth_death import RESERVOIR_BOX

import grmc
from grmc import exact
from grmc.exact import pair_reaction_exact
from grmc.next_order import (
    discreteness_difference,
    factor_values,
    mean_correction,
    next_order,
    variance_error,
)

MEANS = (5, 10, 20, 50, 100)


def pair_box(mean: float, *, acceptors: float = 0.0) -> grmc.Model:
    """Band-to-band pair generation and recombination only, n_i V = mean (dark)."""
    vol = 1.0e-15
    return grmc.build_model(grmc.load_scenario(text=f"""
title = "pair reaction"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = {mean / vol}
radiative_cm3_s = 1.0e-10
acceptors_cm3 = {acceptors}
[volume]
volume_cm3 = {vol}
"""))


def trap_box(scale: float) -> grmc.Model:
    """A lit intrinsic-like box with one acceptor-like trap level near mid-gap; all counts
    scale with the volume (scale 5 -> about 14 electrons, 16 holes, 2 trapped)."""
    vol = scale * 1.0e-15
    return grmc.build_model(grmc.load_scenario(text=f"""
title = "trap box"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e15
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = {vol}
[[traps]]
label = "a"
density_cm3 = 1.0e15
energy_eV = 0.0
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
[light]
generation_cm3_s = 1.0e22
"""))


def _misses(pairs):
    """|delta - (exact - continuum)| / |exact - continuum| for each (delta, difference)."""
    return np.array([abs(d - diff) / abs(diff) for d, diff in pairs])


def _improves(miss: np.ndarray) -> bool:
    """The miss shrinks with the count: the largest miss at this count or above never grows
    (a sign change of the remainder may make one size's miss small by accident), and the
    largest count's miss is below the smallest's."""
    envelope = np.maximum.accumulate(miss[::-1], axis=0)[::-1]
    return bool(np.all(np.diff(envelope, axis=0) <= 0) and np.all(miss[-1] < miss[0]))


def test_pair_reaction_correction_accounts_for_the_exact_departure():
    """Darvey, Ninham & Staff (1966): at mean counts 5..100 the correction accounts for the
    exact-minus-continuum mean to within 20 % of that difference at a mean of 20, and the
    miss shrinks as the count grows; for d = 0 the correction is -1/4, the large-count limit
    of the Bessel law (mean = m I1(2m)/I0(2m) = m - 1/4 - 1/(32 m) + ...)."""
    pairs = []
    for m in MEANS:
        model = pair_box(m)
        no = next_order(model)
        assert no.steady[1] == pytest.approx(m, rel=1e-12)
        ex_mean, _ = pair_reaction_exact(float(m) ** 2, 0)
        pairs.append((no.delta[1], ex_mean - no.steady[1]))
        np.testing.assert_allclose(no.delta[:2], -0.25, rtol=1e-9)
    miss = _misses(pairs)
    assert miss[MEANS.index(20)] <= 0.20
    assert _improves(miss)


def test_pair_reaction_with_a_fixed_difference_against_the_bessel_law():
    """Doped box, d = N_e - N_h = -10 (ten acceptors): the same rule against the exact law of
    Darvey, Ninham & Staff (1966) with d != 0."""
    pairs = []
    for m in MEANS:
        model = pair_box(m, acceptors=10.0 / 1.0e-15)
        no = next_order(model)
        ex_h, _ = pair_reaction_exact(float(m) ** 2, model.charge)
        pairs.append((no.delta[1], ex_h - no.steady[1]))
        assert no.delta[1] - no.delta[0] == pytest.approx(0.0, abs=1e-12)  # keeps the charge
    miss = _misses(pairs)
    assert miss[MEANS.index(20)] <= 0.20
    assert _improves(miss)


def test_linear_birth_death_volume_has_no_correction():
    """Linear laws only (constant generation and reservoir exchange, loss N_e / t_x): the
    linear-noise mean is exact (van Kampen 2007, ch. X), so both terms are exactly zero; the
    master equation agrees with the continuum mean to its own accuracy."""
    model = grmc.build_model(grmc.load_scenario(text=RESERVOIR_BOX))
    no = next_order(model)
    assert np.all(no.delta == 0.0)
    assert np.all(no.var_error == 0.0)
    assert np.all(no.curvature == 0.0) and np.all(no.discreteness == 0.0)
    res = exact.solve(model)
    np.testing.assert_allclose(res.mean, no.steady, rtol=1e-9)


def test_small_trap_volume_against_the_master_equation():
    """Trap box at about 14..280 electrons: the correction accounts for the exact (master
    equation) minus continuum mean of every species to within 20 % of that difference at
    about 20 counts (scale 10 gives 28 electrons, 32 holes, 5 trapped), the miss shrinking
    with the volume."""
    per_species = []
    for scale in (5, 10, 20, 50):
        model = trap_box(scale)
        no = next_order(model)
        res = exact.solve(model)
        per_species.append(_misses(zip(no.delta, res.mean - no.steady)))
    per_species = np.array(per_species)  # (scales, species)
    assert np.all(per_species[1] <= 0.20)
    assert _improves(per_species)


def test_variance_error_estimate_covers_the_exact_departure():
    """The variance proxy is at least the exact departure of the variance from the linear
    noise one: pair reaction (Darvey, Ninham & Staff 1966) and the trap box (master
    equation), at every size tried."""
    for m in MEANS:
        model = pair_box(m)
        _, ex_var = pair_reaction_exact(float(m) ** 2, 0)
        no = next_order(model)
        assert abs(ex_var - no.var_lna[1]) <= no.var_error[1]
    for scale in (5, 20):
        model = trap_box(scale)
        no = next_order(model)
        res = exact.solve(model)
        assert np.all(np.abs(res.var - no.var_lna) <= no.var_error)
    np.testing.assert_array_equal(variance_error(pair_box(20)), next_order(pair_box(20)).var_error)


def test_falling_factorial_term_is_minus_the_rate_over_the_count():
    """Auger e-e-h: exact C N(N-1)P/V^2 against macroscopic C N^2 P/V^2 differ by -C N P/V^2,
    i.e. -a/N (closed form); every two-body or linear channel has no such term."""
    model = grmc.build_model(grmc.load_scenario(text="""
title = "auger"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e16
radiative_cm3_s = 1.0e-10
auger_electron_cm6_s = 1.0e-28
[volume]
volume_cm3 = 1.0e-15
"""))
    x = np.array([7.0, 9.0])
    vals = factor_values(model, x, np.zeros(2))
    diff = discreteness_difference(model, vals)
    names = list(model.channel_names)
    r = names.index("Auger eeh")
    a = model.rates(x)[r]
    assert diff[r] == pytest.approx(-a / x[0], rel=1e-12)
    assert np.all(np.delete(diff, r) == 0.0)
    np.testing.assert_allclose(model.propensities(x) - model.rates(x), diff, rtol=1e-12,
                               atol=1e-30)


def test_mean_correction_is_the_next_order_delta():
    model = trap_box(10)
    np.testing.assert_array_equal(mean_correction(model), next_order(model).delta)
    assert mean_correction(model).shape == (model.n_species,)


def test_check_and_exact_files_carry_the_correction(tmp_path, capsys):
    """`grmc check --json` holds mean_next_order keyed by species (the same numbers as
    mean_correction), the printout warns where it exceeds 10 % of the continuum mean (the
    pair reaction at a mean of 1: -1/4 is 25 %), and `grmc exact` files hold the variable
    with its registered units and pass the file validation on load."""
    import json

    from grmc.cli import main
    from grmc.dataset import load

    text = """
title = "pair reaction at one pair"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e15
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = 1.0e-15
[run]
trajectories = 8
duration_s = 1.0e-5
samples = 64
"""
    path = tmp_path / "pair.toml"
    path.write_text(text)
    assert main(["check", "--json", str(path)]) == 0
    info = json.loads(capsys.readouterr().out)
    model = grmc.build_model(grmc.load_scenario(path))
    expected = mean_correction(model)
    assert list(info["mean_next_order"]) == list(model.species)
    np.testing.assert_allclose(list(info["mean_next_order"].values()), expected, rtol=1e-12)
    assert main(["check", str(path)]) == 0
    printed = capsys.readouterr().out
    assert "next order" in printed and "next-order correction of the mean" in printed
    out = tmp_path / "pair_exact.nc"
    assert main(["exact", str(path), "-o", str(out)]) == 0
    ds = load(out)
    assert ds["mean_next_order"].dims == ("species",)
    assert ds["mean_next_order"].attrs["units"] == "1"
    np.testing.assert_allclose(ds["mean_next_order"].values, expected, rtol=1e-12)
