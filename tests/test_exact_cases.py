"""Cases that used to defeat the exact solver (a minute or more, or a traceback), now answered
in seconds or refused at once with the reason.

References named beside each check: the equilibrium product law of a reversible chain
(detailed balance; derived in test_exact.py's dark-law test, Kelly, Reversibility and
Stochastic Networks, 1979, from memory), the stationary balance of every species' mean
production and loss (a property of any stationary law: d<x>/dt = 0; common practice), and
scipy's dense matrix exponential.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from scipy import special

import grmc
from grmc import exact
from grmc.cli import main
from grmc.exact import ExactUnresolved

BOX = (Path(__file__).resolve().parent.parent / "scenarios" / "p_type_trap_box.toml").read_text()


def box(**swap) -> str:
    """The bundled p-type trap box with some of its lines replaced."""
    text = BOX
    for old, new in swap.items():
        key = old.replace("__", ".")
        lines = [ln for ln in text.splitlines() if ln.split("=")[0].strip() == key]
        assert len(lines) == 1, key
        text = text.replace(lines[0], f"{key} = {new}")
    return text


def test_many_traps_in_the_dark_solve_on_a_window_and_match_the_product_law():
    """300 mid-gap traps with about ten carriers (n_i V = 10): the solver keeps a window of
    occupancies (fewer configurations than the 301 of the whole level) and its mean and
    variance match the equilibrium product law
    pi ~ (n_i V)^(N_e + N_h) / (N_e! N_h!) C(T, M) exp(-M E_t / kT) on the charge shell
    (detailed balance) to 1e-8 relative."""
    vol, ni, T = 1.0e-14, 1.0e15, 300
    model = grmc.build_model(grmc.load_scenario(text=f"""
title = "dark box with 300 traps"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = {ni}
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = {vol}
[[traps]]
label = "midgap"
count = {T}
energy_eV = 0.0
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
"""))
    res = exact.solve(model)
    configs = res.n_states // (res.max_pairs + 1)
    assert configs < T + 1
    m = np.arange(T + 1)[:, None]
    ne = np.arange(200)[None, :]
    nh = ne + m - model.charge
    logw = ((ne + nh) * math.log(ni * vol) - special.gammaln(ne + 1.0)
            - special.gammaln(nh + 1.0) + special.gammaln(T + 1.0)
            - special.gammaln(m + 1.0) - special.gammaln(T - m + 1.0))
    w = np.exp(logw - logw.max())
    w /= w.sum()
    for s, X in enumerate((ne + 0 * m, nh, m + 0 * ne)):
        mean = float((w * X).sum())
        var = float((w * (X - mean) ** 2).sum())
        assert res.mean[s] == pytest.approx(mean, rel=1e-8)
        assert res.var[s] == pytest.approx(var, rel=1e-8)


def test_one_level_box_of_1e14_cm3_solves_with_its_spectra():
    """The bundled trap box at 1e-14 cm^3 (1000 holes, 300 traps, a third of an electron):
    the stationary law and 60-odd spectral frequencies on a few hundred states (before:
    3311 states and about three minutes); the spectra integrate to the variances
    (Parseval, trapezoid in log f with the flat and 1/f^2 tails) to 2 %."""
    scen = grmc.load_scenario(text=box(size_nm="[100.0, 100.0, 1000.0]"))
    model = grmc.build_model(scen)
    f = np.geomspace(1e3, 1e13, 161)
    res = exact.solve(model, freqs=f)
    assert res.n_states < 1000 and res.mass_outside < 1e-10
    for s in range(model.n_species):
        y = res.psd[s]
        total = np.trapezoid(y * f, np.log(f)) + y[0] * f[0] + y[-1] * f[-1]
        assert total == pytest.approx(res.var[s], rel=0.02)


def test_cold_lit_volume_whose_rates_span_fifty_decades():
    """4 K, n_i = 1e-5 cm^-3, a level 0.05 eV above mid-gap (emission ~1e50 times faster than
    capture): the stationary law balances every species' mean production and loss
    (d<x>/dt = 0) to 1e-9 of the largest mean rate, with a relative residual below 1e-10, and
    the electrons' spectrum (row-scaled resolvents) integrates to their variance (Parseval,
    trapezoid in log f with the flat and 1/f^2 tails) to 2 %; its transient, which would
    need steps of 1e-51 s, is refused with the reason."""
    text = box(temperature_K="4.0", intrinsic_density_cm3="1.0e-5", energy_eV="0.05",
               generation_cm3_s="1.0e15")
    model = grmc.build_model(grmc.load_scenario(text=text))
    f = np.geomspace(1e-2, 1e8, 201)
    res = exact.solve(model, freqs=f)
    assert res.residual < 1e-10
    rates = res.probability @ model.propensities(res.states)
    drift = rates @ model.stoich
    assert np.all(np.abs(drift) <= 1e-9 * rates.max())
    y = res.psd[0]
    total = np.trapezoid(y * f, np.log(f)) + y[0] * f[0] + y[-1] * f[-1]
    assert total == pytest.approx(res.var[0], rel=0.02)
    with pytest.raises(ExactUnresolved, match="sparse products"):
        exact.solve(model, times=[0.0, 1e-6])


def test_transient_beyond_reach_is_refused_at_once():
    """Taylor steps of a chain with a 1e12 1/s rate over one second: refused before stepping
    (ExactUnresolved names the products it would take); a reachable one matches scipy's dense
    exponential."""
    Q = np.array([[-1e12, 1e12], [1.0, -1.0]])
    import scipy.sparse as sp

    with pytest.raises(ExactUnresolved, match="sparse products"):
        exact.transient(sp.csr_matrix(Q), np.array([1.0, 0.0]), [1.0], method="sparse")
    Q = np.array([[-3.0, 2.0, 1.0], [0.5, -1.5, 1.0], [0.2, 0.3, -0.5]])
    t = np.linspace(0.0, 4.0, 9)
    P = exact.transient(sp.csr_matrix(Q), np.array([1.0, 0.0, 0.0]), t, method="sparse")
    for k, tk in enumerate(t):
        ref = scipy.linalg.expm(Q.T * tk) @ np.array([1.0, 0.0, 0.0])
        np.testing.assert_allclose(P[k], ref, rtol=0, atol=1e-13)


def test_exact_command_refuses_a_window_beyond_reach_in_one_line(tmp_path, capsys):
    """`grmc exact` on the trap box made stiff (fast band-to-band recombination, 1e7 1/s per
    electron, and a trap level a million times slower) with a one-second window: one line on
    stderr naming the file and the reason, exit 2, no file."""
    path = tmp_path / "long.toml"
    path.write_text(box(radiative_cm3_s="1.0e-10", electron_cross_section_cm2="1.0e-24",
                        hole_cross_section_cm2="1.0e-24", duration_s="1.0", settle_s="0.0"))
    out = tmp_path / "long.nc"
    assert main(["exact", str(path), "-o", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(path) in err[0] and "sparse products" in err[0]
    assert not out.exists()


def test_spectra_of_a_large_chain_reuse_factorisations_without_losing_accuracy():
    """A chain of more than 2000 states (lit box with 40 traps, about 60 carriers): frequencies
    near a factorised one are solved by preconditioned GMRES; every spectrum value agrees
    with scipy's direct sparse solve of the resolvent, S_aa = 4 Re (pi o y)^T (i w I - Q)^-1 y
    (module notes of grmc.exact), to 1e-9 relative."""
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    model = grmc.build_model(grmc.load_scenario(text="""
title = "lit box, 40 traps"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e15
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = 2.0e-14
[[traps]]
label = "a"
count = 40
energy_eV = 0.0
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
[light]
generation_cm3_s = 1.0e22
"""))
    f = np.geomspace(1e4, 1e9, 21)
    res = exact.solve(model, freqs=f)
    assert res.n_states >= exact._REUSE_MIN
    Q = sp.csc_matrix(res._generator).astype(complex)
    pi = res.probability[res._support]
    Y = res.states[res._support].astype(float)
    Y = Y - pi @ Y
    eye = sp.identity(Q.shape[0], dtype=complex, format="csc")
    for k in (1, 7, 13, 20):
        w = 2.0 * np.pi * f[k]
        U = spla.spsolve(((1j * w) * eye - Q).tocsc(), Y.astype(complex))
        ref = 4.0 * np.real(np.einsum("i,ia,ia->a", pi, Y, U))
        np.testing.assert_allclose(res.psd[:, k], ref, rtol=1e-9)
