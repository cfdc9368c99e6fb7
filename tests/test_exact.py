"""Tests of the exact master-equation solver (grmc.exact).

Every check names its reference: a closed form with its published source, an exact identity
(detailed balance, Parseval, the Wiener-Khinchin relation) or an independent computation.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from scipy import integrate

import grmc
from grmc import continuum, exact
from grmc.exact import (
    StateSpaceTooLarge,
    TruncationWarning,
    pair_reaction_exact,
    pair_reaction_law,
    solve,
    telegraph_psd,
)
from grmc.model import BOLTZMANN_EV_K

TEMPERATURE_K = 300.0
KT_EV = BOLTZMANN_EV_K * TEMPERATURE_K


def scenario_text(
    *,
    ni=1.0e15,
    volume=1.0e-15,
    radiative=0.0,
    auger_n=0.0,
    auger_p=0.0,
    donors=0.0,
    acceptors=0.0,
    generation=None,
    traps=(),
):
    """TOML of a test scenario (docs/file-format.md); traps: dicts of [[traps]] keys."""
    lines = [
        'title = "exact-solver test"',
        "[material]",
        f"temperature_K = {TEMPERATURE_K!r}",
        f"intrinsic_density_cm3 = {ni!r}",
        f"radiative_cm3_s = {radiative!r}",
        f"auger_electron_cm6_s = {auger_n!r}",
        f"auger_hole_cm6_s = {auger_p!r}",
        f"donors_cm3 = {donors!r}",
        f"acceptors_cm3 = {acceptors!r}",
        "[volume]",
        f"volume_cm3 = {volume!r}",
    ]
    for t in traps:
        lines.append("[[traps]]")
        for key, value in t.items():
            lines.append(f"{key} = {value!r}" if not isinstance(value, str)
                         else f'{key} = "{value}"')
    if generation is not None:
        lines += ["[light]", f"generation_cm3_s = {generation!r}"]
    return "\n".join(lines) + "\n"


def model_of(**kw):
    return grmc.build_model(grmc.load_scenario(text=scenario_text(**kw)))


def trap(label, count, energy, kind, cn, cp):
    return {"label": label, "count": count, "energy_eV": energy, "kind": kind,
            "electron_capture_cm3_s": cn, "hole_capture_cm3_s": cp}


def log_simpson_integral(f, y):
    """int y df on a uniform grid in ln f (Simpson), plus the flat low-f and 1/f^2 high-f tails."""
    u = np.log(f)
    body = integrate.simpson(y * f, x=u)
    return body + y[0] * f[0] + y[-1] * f[-1]


# --------------------------------------------------------------------------------------------
# State space and generator
# --------------------------------------------------------------------------------------------


def test_state_space_is_the_charge_shell_and_indexes_round_trip():
    """Every state has the model's charge and no negative count; index() inverts the layout."""
    model = model_of(ni=1e15, radiative=1e-10, donors=2e15,
                     traps=[trap("a", 3, 0.05, "acceptor", 1e-9, 2e-9),
                            trap("b", 2, -0.1, "donor", 3e-9, 1e-9)])
    space = exact.state_space(model, 7)
    X = space.states
    assert space.n_states == 4 * 3 * 8
    assert np.all(X >= 0)
    assert np.all(X[:, 2:] <= np.array(model.counts.traps))
    assert np.all(X @ model.charge_weights == model.charge)
    assert len({tuple(x) for x in X}) == space.n_states
    np.testing.assert_array_equal(space.index(X), np.arange(space.n_states))
    assert np.all(np.minimum(X[:, 0], X[:, 1]) <= 7)
    # states outside the truncation or of another charge are not found
    outside = X[np.argmax(space.minority)] + np.array([1, 1, 0, 0])
    assert space.index(outside) == -1
    assert space.index(X[0] + np.array([1, 0, 0, 0])) == -1


def test_generator_entries_are_the_model_propensities():
    """Q[i, k] = sum of a_r(x_i) over channels with x_i + nu_r = x_k (the master equation);
    reflecting rows sum to 0, absorbing rows to minus the outflow."""
    model = model_of(ni=1e15, radiative=1e-10, auger_n=1e-25, auger_p=5e-26, generation=1e21,
                     traps=[trap("a", 2, 0.05, "acceptor", 1e-9, 2e-9)])
    space = exact.state_space(model, 5)
    Q, out = exact.generator(model, space, boundary="reflecting")
    Qa, out_a = exact.generator(model, space, boundary="absorbing")
    np.testing.assert_allclose(np.asarray(Q.sum(axis=1)).ravel(), 0.0, atol=1e-6)
    np.testing.assert_allclose(np.asarray(Qa.sum(axis=1)).ravel(), -out_a, rtol=1e-12,
                               atol=1e-6)
    np.testing.assert_array_equal(out, out_a)
    dense = Q.toarray()
    for i in range(0, space.n_states, 3):
        x = space.states[i]
        a = model.propensities(x)
        expected = {}
        for r, nu in enumerate(model.stoich):
            k = int(space.index(x + nu))
            if a[r] > 0 and k >= 0:
                expected[k] = expected.get(k, 0.0) + a[r]
        for k in range(space.n_states):
            if k != i:
                assert dense[i, k] == pytest.approx(expected.get(k, 0.0), rel=1e-12)
        assert out[i] == pytest.approx(
            sum(a[r] for r, nu in enumerate(model.stoich) if space.index(x + nu) < 0),
            rel=1e-12, abs=0.0)


# --------------------------------------------------------------------------------------------
# Stationary laws against closed forms
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("d", [0, 3, -2])
def test_pair_reaction_matches_darvey_ninham_staff(d):
    """Band-to-band only: g = B n_i^2 V, k = B / V, lambda = n_i^2 V^2 = 4 < 10.

    Reference: Darvey, Ninham & Staff, J. Chem. Phys. 45, 2145 (1966): <N_h> =
    sqrt(lambda) I_{d+1}(z) / I_d(z), var = lambda - d <N_h> - <N_h>^2, z = 2 sqrt(lambda);
    to 1e-8 relative.  The continuum answer (-d + sqrt(d^2 + 4 lambda)) / 2 is far off here.
    """
    ni, vol = 2.0e15, 1.0e-15  # n_i V = 2
    model = model_of(ni=ni, volume=vol, radiative=1e-10,
                     donors=max(d, 0) / vol, acceptors=max(-d, 0) / vol)
    assert model.charge == d
    lam = (ni * vol) ** 2
    res = solve(model)
    mean_h, var_h = pair_reaction_exact(lam, d)
    assert res.mean[1] == pytest.approx(mean_h, rel=1e-8)
    assert res.mean[0] == pytest.approx(mean_h + d, rel=1e-8)
    assert res.var[1] == pytest.approx(var_h, rel=1e-8)
    assert res.var[0] == pytest.approx(var_h, rel=1e-8)
    assert res.mass_outside < 1e-10
    continuum = (-d + math.sqrt(d * d + 4 * lam)) / 2
    assert abs(continuum / mean_h - 1) > 0.05


@pytest.mark.parametrize("d", [0, 3, -2])
def test_pair_reaction_law_is_poisson_pair_conditioned_on_difference(d):
    """The whole law of N_h: two independent Poisson counts of mean sqrt(lambda) conditioned on
    their difference d (normalised by the Skellam pmf, scipy.stats.skellam), which is also the
    Darvey-Ninham-Staff law lambda^(n + d/2) / (n! (n + d)! I_d(2 sqrt(lambda))); to 1e-12."""
    ni, vol = 2.0e15, 1.0e-15
    model = model_of(ni=ni, volume=vol, radiative=1e-10,
                     donors=max(d, 0) / vol, acceptors=max(-d, 0) / vol)
    res = solve(model)
    mu = ni * vol
    n, p = res.marginal("holes")
    ref = (scipy.stats.poisson.pmf(n + d, mu) * scipy.stats.poisson.pmf(n, mu)
           / scipy.stats.skellam.pmf(d, mu, mu))
    np.testing.assert_allclose(p, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(pair_reaction_law(mu**2, d, n), ref, rtol=1e-10, atol=1e-300)
    assert p.sum() == pytest.approx(1.0, abs=1e-13)


def test_pair_reaction_exact_is_finite_for_large_lambda():
    """ive keeps the Bessel ratio finite; for large lambda the mean tends to the continuum
    (-d + sqrt(d^2 + 4 lambda)) / 2 (Darvey, Ninham & Staff 1966, large-volume limit)."""
    lam, d = 1.0e8, 50
    mean, var = pair_reaction_exact(lam, d)
    continuum = (-d + math.sqrt(d * d + 4 * lam)) / 2
    assert math.isfinite(mean) and math.isfinite(var) and var > 0
    assert mean == pytest.approx(continuum, rel=1e-3)


def test_dark_law_is_the_product_law_restricted_to_the_charge():
    """Equilibrium law with radiative, both Auger channels and two trap levels (acceptor- and
    donor-like), from detailed balance (derived here; docs/physics-notes.md states the product form).

    For pi(x) = (mu_e^N_e / N_e!) (mu_h^N_h / N_h!) prod_k C(T_k, M_k) theta_k^M_k restricted to
    the charge shell, each channel pair balances:
      thermal generation / radiative, impact / Auger (both kinds):
        pi(x) B n_i^2 V = pi(x + (1,1)) B (N_e+1)(N_h+1) / V  <=>  mu_e mu_h = n_i^2 V^2
        (the Auger pair gives the same condition, the factor N_e or N_h cancelling);
      trap k, electron side: pi(x) c_n N_e (T-M)/V = pi(x - e + M) c_n n_1 (M+1)
        <=>  theta_k = mu_e / (n_1 V);
      trap k, hole side: pi(x) c_p N_h M/V = pi(x - h - M) c_p p_1 (T-M+1)
        <=>  theta_k = p_1 V / mu_h, consistent because n_1 p_1 = n_i^2.
    Every pair balancing is detailed balance, which implies stationarity (and Kolmogorov's
    criterion holds: Kolmogorov, Math. Ann. 112, 155 (1936), from memory).  On the shell
    N_e - N_h + sum M = Q the factor exp(phi (N_e - N_h + sum M)) of mu_e = n_i V e^phi,
    mu_h = n_i V e^-phi, theta_k = e^phi n_i / n_1 is constant, so take phi = 0:
      pi(x) ~ (n_i V)^(N_e + N_h) / (N_e! N_h!) prod_k C(T_k, M_k) exp(-M_k E_t,k / kT).
    The reflecting truncation of a reversible chain has the restricted law (Kelly, Reversibility
    and Stochastic Networks, 1979, section 1.6, from memory), so the match is to rounding: law
    to 1e-12 absolute, moments to 1e-8 relative.
    """
    ni, vol = 2.0e15, 1.0e-15
    traps = [trap("a", 3, 0.05, "acceptor", 1e-9, 2e-9),
             trap("b", 2, -0.1, "donor", 3e-9, 1e-9)]
    model = model_of(ni=ni, volume=vol, radiative=1e-10, auger_n=1e-25, auger_p=5e-26,
                     donors=2.0 / vol, traps=traps)
    res = solve(model)
    # Reference by an independent enumeration of the charge shell (generous carrier range).
    T = [3, 2]
    E = [0.05, -0.1]
    refs = {}
    for m in itertools.product(range(T[0] + 1), range(T[1] + 1)):
        for ne in range(120):
            nh = ne + sum(m) - model.charge
            if nh < 0:
                continue
            logw = ((ne + nh) * math.log(ni * vol) - math.lgamma(ne + 1) - math.lgamma(nh + 1)
                    + sum(math.log(math.comb(T[k], m[k])) - m[k] * E[k] / KT_EV
                          for k in range(2)))
            refs[(ne, nh) + m] = logw
    keys = list(refs)
    logw = np.array([refs[k] for k in keys])
    w = np.exp(logw - logw.max())
    w /= w.sum()
    ref = dict(zip(keys, w))
    p_ref = np.array([ref[tuple(int(v) for v in x)] for x in res.states])
    assert 1.0 - p_ref.sum() < 1e-10  # the reference mass outside the truncation
    np.testing.assert_allclose(res.probability, p_ref, rtol=0, atol=1e-12)
    X = np.array(keys, dtype=float)
    mean_ref = w @ X
    var_ref = w @ (X - mean_ref) ** 2
    np.testing.assert_allclose(res.mean, mean_ref, rtol=1e-8)
    np.testing.assert_allclose(res.var, var_ref, rtol=1e-8)


def test_dark_solution_satisfies_detailed_balance():
    """In the dark, pi_i Q_ik = pi_k Q_ki for every pair of states (detailed balance), and each
    reverse pair of channels fires equally often on average (docs/physics-notes.md); to 1e-10 of the
    total flux."""
    model = model_of(ni=3e15, radiative=1e-10, auger_n=1e-25, auger_p=5e-26, acceptors=1e15,
                     traps=[trap("a", 4, 0.1, "acceptor", 1e-9, 2e-9)])
    res = solve(model)
    Q = exact.generator(model, exact.state_space(model, res.max_pairs))[0]
    flux = Q.multiply(res.probability[:, None]).tocsr()
    flux.setdiag(0)
    total = abs(flux).sum()
    assert abs(flux - flux.T).sum() < 1e-10 * total
    mean_prop = res.probability @ model.propensities(res.states)
    for fwd, rev in model.reverse_pairs:
        assert mean_prop[fwd] == pytest.approx(mean_prop[rev], rel=1e-10)


# --------------------------------------------------------------------------------------------
# Spectra
# --------------------------------------------------------------------------------------------


def test_single_trap_exchanging_with_fixed_band_is_machlups_telegraph():
    """One acceptor trap (T = 1) in an n-type volume with 100 donors, only the electron side
    (c_p = 0) and no band-to-band channel: N_h stays 0 and N_e = 100 - M, so the chain is exactly
    the two-state process with tau_0 = 1/(c_n n) (n = 100 / V, the count while the trap is empty)
    and tau_1 = 1/e_n = 1/(c_n n_1).  Machlup, J. Appl. Phys. 25, 341 (1954):
    S(f) = 4 / ((tau_1 + tau_0) ((1/tau_1 + 1/tau_0)^2 + (2 pi f)^2)); to 1e-9 relative.
    The chain is reducible (N_h never changes); x0 selects the class."""
    vol, cn, e_t, ni = 1.0e-15, 1.0e-9, 0.40, 1.0e10
    model = model_of(ni=ni, volume=vol, donors=100 / vol,
                     traps=[trap("rts", 1, e_t, "acceptor", cn, 0.0)])
    f = np.logspace(3, 11, 33)
    res = solve(model, freqs=f, x0=[100, 0, 0])
    n1 = ni * math.exp(e_t / KT_EV)
    tau_0, tau_1 = 1.0 / (cn * 100 / vol), 1.0 / (cn * n1)
    np.testing.assert_allclose(res.psd[2], telegraph_psd(f, tau_1, tau_0), rtol=1e-9)
    np.testing.assert_allclose(res.psd[0], telegraph_psd(f, tau_1, tau_0), rtol=1e-9)
    # N_e = 100 - M: the cross-spectrum electrons-trap is minus the trap's PSD
    np.testing.assert_allclose(res.psd_matrix[0, 2], -res.psd[2], rtol=1e-9)
    assert res.var[2] == pytest.approx(tau_1 * tau_0 / (tau_1 + tau_0) ** 2, rel=1e-10)


def test_single_trap_in_finite_reservoir_tends_to_machlup():
    """One mid-gap trap (T = 1, c_n = c_p) in an intrinsic volume of InSb-like n_i = 2e16 cm^-3
    (Levinshtein, Rumyantsev & Shur, Handbook Series on Semiconductor Parameters vol. 1, 1996)
    with N_e ~ N_h ~ N, band-to-band channel on.  Machlup (1954) with tau_0 = 1/(c_n n + e_p),
    tau_1 = 1/(e_n + c_p p) (docs/physics-notes.md) at the exact mean densities.  Finite reservoir: the
    carrier counts the trap sees differ from the mean counts by at most about one carrier, a
    relative change O(1/N) of the rates, hence of the spectrum: the deviation must stay below
    1/N and fall as 1/N (a four times larger volume: ratio 4, accepted within [3, 5])."""
    ni, cn = 2.0e16, 1.0e-9
    f = np.logspace(3, 11, 17)
    devs = []
    for vol in (5.0e-15, 2.0e-14):
        model = model_of(ni=ni, volume=vol, radiative=1e-10,
                         traps=[trap("rts", 1, 0.0, "acceptor", cn, cn)])
        res = solve(model, freqs=f)
        n, p = res.mean[0] / vol, res.mean[1] / vol
        tau_0, tau_1 = 1 / (cn * n + cn * ni), 1 / (cn * ni + cn * p)
        dev = np.max(np.abs(res.psd[2] / telegraph_psd(f, tau_1, tau_0) - 1))
        N = min(res.mean[0], res.mean[1])
        assert dev < 1.0 / N
        devs.append(dev)
    assert 3.0 < devs[0] / devs[1] < 5.0


def test_parseval_integral_of_psd_is_variance():
    """Parseval / Wiener-Khinchin: int_0^inf S_aa(f) df = var(x_a) and
    int_0^inf Re S_eh(f) df = cov(N_e, N_h), for a driven (light on) volume with a trap level
    and every channel kind; to 1e-5 relative."""
    model = model_of(ni=1e15, radiative=1e-10, auger_n=1e-25, auger_p=5e-26, generation=1e20,
                     traps=[trap("a", 2, 0.1, "acceptor", 1e-9, 2e-9)])
    res = solve(model)
    Q = res._generator
    rates = -Q.diagonal()
    f = np.logspace(math.log10(rates[rates > 0].min() / (2 * math.pi)) - 6,
                    math.log10(rates.max() / (2 * math.pi)) + 6, 60 * 24 + 1)
    S = res.spectrum(np.eye(model.n_species), f)
    for a in range(model.n_species):
        assert log_simpson_integral(f, S[a, a].real) == pytest.approx(res.var[a], rel=1e-5)
    assert log_simpson_integral(f, S[0, 1].real) == pytest.approx(res.covariance[0, 1],
                                                                   rel=1e-5)


def test_cross_spectrum_convention_by_direct_fourier_transform():
    """S_ab(f) = 2 int E[dx_a(t + tau) dx_b(t)] exp(-2 pi i f tau) dtau (the convention of the
    linear-noise spectral matrix in docs/physics-notes.md), checked by transforming the covariance
    function computed independently in the time domain, exp(Q tau) by scipy.linalg.expm, with
    QUADPACK's Fourier integrals (scipy.integrate.quad, weight cos/sin); Wiener-Khinchin.
    exp(Q tau) comes from an eigendecomposition, checked against scipy.linalg.expm.
    A driven chain has a non-zero imaginary cross-spectrum; to 1e-6 relative."""
    model = model_of(ni=5e14, radiative=1e-10, generation=3e20,
                     traps=[trap("a", 2, 0.1, "acceptor", 1e-9, 3e-9)])
    res = solve(model)
    Q = res._generator.toarray()
    pi = res.probability[res._support]
    X = res.states[res._support].astype(float)
    Y = X - pi @ X
    a, b = 0, 2  # electrons, trapped

    # exp(Q tau) = V exp(L tau) V^-1 from one eigendecomposition (a route independent of the
    # resolvent); checked against scipy.linalg.expm at one lag.
    lam, V = scipy.linalg.eig(Q)
    left = (pi[:, None] * Y).T @ V  # (species, modes)
    right = np.linalg.solve(V, Y)  # (modes, species)

    def cov(tau, first, second):  # E[y_first(t + tau) y_second(t)], tau >= 0
        return float(np.real(left[second] @ (np.exp(lam * tau) * right[:, first])))

    tau_check = 3e-8
    direct_cov = (pi * Y[:, b]) @ (scipy.linalg.expm(Q * tau_check) @ Y[:, a])
    assert cov(tau_check, a, b) == pytest.approx(direct_cov, rel=1e-9)

    scale = 1.0 / -np.diag(Q).max()  # integrate in s = tau / scale (dimensionless)

    def fourier(first, second, w, weight):
        val, _ = integrate.quad(lambda s: cov(s * scale, first, second), 0, np.inf,
                                weight=weight, wvar=w * scale, limlst=200)
        return scale * val

    for f in (1e6, 1e7):
        w = 2 * math.pi * f
        # positive lags: E[y_a(t + tau) y_b(t)]; negative lags: E[y_b(t + tau) y_a(t)]
        pos = fourier(a, b, w, "cos") - 1j * fourier(a, b, w, "sin")
        neg = fourier(b, a, w, "cos") + 1j * fourier(b, a, w, "sin")
        direct = 2 * (pos + neg)
        got = res.spectrum(np.eye(model.n_species), [f])[a, b, 0]
        assert abs(direct.imag) > 1e-3 * abs(direct)
        assert got.real == pytest.approx(direct.real, rel=1e-6)
        assert got.imag == pytest.approx(direct.imag, rel=1e-6)


# --------------------------------------------------------------------------------------------
# Transient
# --------------------------------------------------------------------------------------------


def test_transient_starts_at_x0_and_ends_at_the_stationary_law():
    """p(0) is the point mass at x0; after many relaxation times the mean and variance are the
    stationary ones (ergodicity of a finite irreducible chain); to 1e-8 relative.  Intermediate
    times agree with one dense matrix exponential per time (scipy.linalg.expm, no stepping),
    for both the sparse (expm_multiply, Al-Mohy & Higham 2011) and the dense path; to 1e-9."""
    ni, vol = 2.0e15, 1.0e-15
    model = model_of(ni=ni, volume=vol, radiative=1e-10, donors=1 / vol,
                     traps=[trap("a", 2, 0.0, "acceptor", 1e-9, 1e-9)])
    x0 = np.array([6, 5, 0])  # five excess pairs above the neutral ground
    times = np.array([0.0, 1e-7, 1e-6, 1e-5, 3e-4])
    res = solve(model, times=times, x0=x0)
    np.testing.assert_array_equal(res.transient_mean[0], x0)
    np.testing.assert_array_equal(res.transient_var[0], 0.0)
    np.testing.assert_allclose(res.transient_mean[-1], res.mean, rtol=1e-8)
    np.testing.assert_allclose(res.transient_var[-1], res.var, rtol=1e-8)
    assert np.all(res.transient_mass_lost < 1e-10)
    # independent: dense exponential of the absorbing generator on the same truncation
    space = exact.state_space(model, res.max_pairs)
    Qa_sparse = exact.generator(model, space, boundary="absorbing")[0]
    Qa = Qa_sparse.toarray()
    p0 = np.zeros(space.n_states)
    p0[space.index(x0)] = 1.0
    X = space.states.astype(float)
    P_sparse = exact.transient(Qa_sparse, p0, times, method="sparse")
    P_dense = exact.transient(Qa_sparse, p0, times, method="dense")
    for k, t in enumerate(times[1:4], start=1):
        p = scipy.linalg.expm(Qa.T * t) @ p0
        np.testing.assert_allclose(res.transient_mean[k], (p @ X) / p.sum(), rtol=1e-9)
        np.testing.assert_allclose(P_sparse[k], p, rtol=0, atol=1e-12)
        np.testing.assert_allclose(P_dense[k], p, rtol=0, atol=1e-12)


def test_default_start_is_nearest_neutral_state_plus_excess_pairs():
    """Without x0 the transient starts from Model.nearest_neutral_state of the exact mean plus
    the scenario's [start] excess_pairs (docs/file-format.md)."""
    text = scenario_text(ni=2e15, radiative=1e-10, donors=3e15) + "[start]\nexcess_pairs = 4\n"
    model = grmc.build_model(grmc.load_scenario(text=text))
    res = solve(model, times=[0.0])
    expected = model.nearest_neutral_state(res.mean) + np.array([4, 4])
    np.testing.assert_array_equal(res.x0, expected)
    np.testing.assert_array_equal(res.transient_mean[0], expected)


# --------------------------------------------------------------------------------------------
# Truncation control
# --------------------------------------------------------------------------------------------


def test_truncation_grows_until_mass_outside_below_tol():
    """A volume with ~100 pairs needs more than the first truncation (J = 15); the reported
    mass outside is below tol, and the mean agrees with Darvey, Ninham & Staff (1966)."""
    ni, vol = 1.0e17, 1.0e-15  # n_i V = 100
    res = solve(grmc.build_model(grmc.load_scenario(
        text=scenario_text(ni=ni, volume=vol, radiative=1e-10))), tol=1e-12)
    assert res.max_pairs > 100
    assert res.mass_outside < 1e-12
    mean_h, var_h = pair_reaction_exact((ni * vol) ** 2, 0)
    assert res.mean[1] == pytest.approx(mean_h, rel=1e-8)
    assert res.var[1] == pytest.approx(var_h, rel=1e-8)


def test_too_large_state_space_is_refused_with_its_size():
    """A volume with ~1e4 carrier pairs needs more than max_states: StateSpaceTooLarge names the
    number of states and points to the Monte Carlo run."""
    model = model_of(ni=1e19, radiative=1e-10)  # n_i V = 1e4
    with pytest.raises(StateSpaceTooLarge) as err:
        solve(model, max_states=5000)
    msg = str(err.value)
    assert f"{err.value.needed:,}" in msg and "grmc run" in msg
    assert err.value.needed > 5000
    # a trap level of ten million traps keeps a window of occupancies about its linear-noise
    # law; when even that window exceeds max_states it is refused before anything is built
    many = model_of(ni=1e15, radiative=1e-10,
                    traps=[trap("t", 10_000_000, 0.0, "acceptor", 1e-9, 1e-9)])
    with pytest.raises(StateSpaceTooLarge) as err:
        solve(many, max_states=1000)
    assert err.value.needed > 1000 and err.value.lower_bound
    assert f"{err.value.needed:,}" in str(err.value)


def test_large_trap_level_is_solved_on_a_window_of_occupancies():
    """Ten million traps: the window about the linear-noise law holds the exact law (edge
    tails below tol), and the mean and variance agree with the linear-noise answer (van
    Kampen's system-size expansion) to its next-order error, about 1/count relative."""
    many = model_of(ni=1e15, radiative=1e-10,
                    traps=[trap("t", 10_000_000, 0.0, "acceptor", 1e-9, 1e-9)])
    res = solve(many)
    assert res.n_states < 20_000 and res.mass_outside < 1e-10
    ref = continuum.lna(many)
    np.testing.assert_allclose(res.mean[1:], ref.mean[1:], rtol=1e-3)
    np.testing.assert_allclose(res.var[1:], np.diag(ref.covariance)[1:], rtol=1e-3)


def test_fixed_truncation_warns_when_too_small():
    """max_pairs fixed below the bulk of the law: a TruncationWarning, never a silent number."""
    model = model_of(ni=2e15, radiative=1e-10)
    with pytest.warns(TruncationWarning):
        res = solve(model, max_pairs=3)
    assert res.mass_outside > 1e-10


def test_bad_inputs_are_refused():
    model = model_of(ni=2e15, radiative=1e-10)
    with pytest.raises(ValueError, match="charge"):
        solve(model, times=[0.0], x0=[1, 0])
    with pytest.raises(ValueError, match="> 0"):
        solve(model, freqs=[0.0, 1.0])
    with pytest.raises(ValueError, match=">= 0"):
        solve(model, times=[-1.0])


def test_telegraph_psd_integrates_to_its_variance():
    """Machlup (1954): the Lorentzian's integral over f >= 0 is Delta^2 tau_1 tau_0 /
    (tau_1 + tau_0)^2 (closed form: int_0^inf 4 A / (a^2 + (2 pi f)^2) df = A / a)."""
    tau_1, tau_0, delta = 2e-6, 5e-7, 3.0
    corner = (1 / tau_1 + 1 / tau_0) / (2 * math.pi)  # integrate in x = f / corner
    val = corner * integrate.quad(lambda x: telegraph_psd(x * corner, tau_1, tau_0, delta),
                                  0, np.inf, epsabs=0, epsrel=1e-12)[0]
    assert val == pytest.approx(delta**2 * tau_1 * tau_0 / (tau_1 + tau_0) ** 2, rel=1e-8)


def test_stationary_law_of_a_random_generator_and_its_fallback(monkeypatch):
    """pi^T Q = 0 for a random dense irreducible generator, against the null space from the
    SVD (scipy.linalg.null_space); the eigs fallback (used when the direct solve fails) gives
    the same law; to 1e-12."""
    rng = np.random.default_rng(3)
    n = 30
    R = rng.exponential(size=(n, n)) * (rng.random((n, n)) < 0.3)
    R[np.arange(n), (np.arange(n) + 1) % n] += 1.0  # a cycle: irreducible
    np.fill_diagonal(R, 0.0)
    Q = R - np.diag(R.sum(axis=1))
    ref = scipy.linalg.null_space(Q.T)[:, 0]
    ref /= ref.sum()
    import scipy.sparse as sp

    pi, res = exact.stationary_law(sp.csr_matrix(Q))
    np.testing.assert_allclose(pi, ref, rtol=0, atol=1e-12)
    assert res < 1e-12

    def fail(*args, **kwargs):
        raise RuntimeError("Factor is exactly singular")

    monkeypatch.setattr(exact, "_pinned_solve", fail)
    pi_fb, _ = exact.stationary_law(sp.csr_matrix(Q))
    np.testing.assert_allclose(pi_fb, ref, rtol=0, atol=1e-12)
