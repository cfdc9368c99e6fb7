"""grmc.continuum: steady state, transient, linear-noise approximation, SRH helpers.

Each assertion names its reference beside it: a published formula or value, an exact
solution of the rate equations, or an independent computation.  Tolerances are derived in
the comments: the steady-state solver balances each species' production and loss to 1e-11
(relative) and each conservation law to 1e-13, so exact identities are checked at 1e-10;
where a textbook formula is a limit, the size of the neglected term is computed and used.

Material numbers
----------------
Si n_i = 1.00e10 cm^-3: Sproul & Green, J. Appl. Phys. 70, 846 (1991).
Si B = 4.73e-15 cm^3/s: Trupke et al., J. Appl. Phys. 94, 4930 (2003).
Si C_n, C_p = 2.8e-31, 9.9e-32 cm^6/s: Dziewior & Schmid, Appl. Phys. Lett. 31, 346 (1977).
GaAs n_i = 2.1e6 cm^-3, B = 7.2e-10 cm^3/s: Levinshtein, Rumyantsev & Shur, Handbook Series
on Semiconductor Parameters vol. 1 (1996).
Capture coefficient c = sigma v_th = 1e-15 cm^2 x 1e7 cm/s = 1e-8 cm^3/s (v_th about 1e7 cm/s,
common practice; sigma = 1e-15 cm^2 is the example value of docs/physics-notes.md).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.integrate import IntegrationWarning, quad

import grmc
from grmc import continuum as cont
from grmc.model import with_light_off

SI_NI = 1.00e10  # Sproul & Green (1991)
SI_B = 4.73e-15  # Trupke et al. (2003)
SI_CN, SI_CP = 2.8e-31, 9.9e-32  # Dziewior & Schmid (1977)
GAAS_NI = 2.1e6  # Levinshtein, Rumyantsev & Shur (1996)
GAAS_B = 7.2e-10  # same handbook
C_CAPTURE = 1.0e-15 * 1.0e7  # sigma v_th [cm^3/s], see the module docstring


def scenario_text(*, ni=SI_NI, B=SI_B, Cn=0.0, Cp=0.0, ND=0.0, NA=0.0, V=1e-15, G=0.0,
                  traps=()) -> str:
    """TOML of a scenario; traps are (count or None, density or None, E, kind, c_n, c_p)."""
    text = f"""
title = "continuum test"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = {float(ni)!r}
radiative_cm3_s = {float(B)!r}
auger_electron_cm6_s = {float(Cn)!r}
auger_hole_cm6_s = {float(Cp)!r}
donors_cm3 = {float(ND)!r}
acceptors_cm3 = {float(NA)!r}
[volume]
volume_cm3 = {float(V)!r}
[light]
generation_cm3_s = {float(G)!r}
"""
    for i, (count, density, energy, kind, cn, cp) in enumerate(traps):
        amount = f"count = {int(count)}" if count is not None else f"density_cm3 = {density!r}"
        text += f"""
[[traps]]
label = "L{i}"
{amount}
energy_eV = {float(energy)!r}
kind = "{kind}"
electron_capture_cm3_s = {float(cn)!r}
hole_capture_cm3_s = {float(cp)!r}
"""
    return text


def make_model(**kw) -> grmc.Model:
    return grmc.build_model(grmc.load_scenario(text=scenario_text(**kw)))


def make_unchecked_model(**kw) -> grmc.Model:
    """A model the scenario validation would refuse (no loss channel): built from a valid
    scenario whose radiative coefficient is then set to ``B`` directly, to test the solver's
    own refusals."""
    import dataclasses

    B = kw.pop("B")
    scen = grmc.load_scenario(text=scenario_text(B=1e-10, **kw))
    scen = dataclasses.replace(scen, material=dataclasses.replace(scen.material,
                                                                  radiative_cm3_s=B))
    return grmc.build_model(scen)


def rate_of(model, x, name):
    return float(model.rates(x)[model.channel_names.index(name)])


def rel(a, b):
    return abs(a - b) / abs(b)


# 5 levels of 1e4 traps, acceptor- and donor-like, E_t - E_i from -0.4 to 0.4 eV
FIVE_LEVELS = tuple(
    (10_000, None, float(e), kind, C_CAPTURE, C_CAPTURE)
    for e, kind in zip(np.linspace(-0.4, 0.4, 5), ["acceptor", "donor"] * 3)
)

SWEEP = {
    "nearly empty intrinsic (n_i V = 1e-3)": {"V": 1e-13},
    "intrinsic, large": {"V": 1e-9},
    "n-type 1e19": {"ND": 1e19},
    "p-type 1e19": {"NA": 1e19},
    "five levels, intrinsic": {"traps": FIVE_LEVELS},
    "five levels, n-type 1e19": {"ND": 1e19, "traps": FIVE_LEVELS},
    "five levels, p-type 1e19": {"NA": 1e19, "traps": FIVE_LEVELS},
    "five levels, nearly empty": {"V": 1e-13, "traps": FIVE_LEVELS},
    "full deep level, n-type 1e19": {
        "ND": 1e19, "traps": ((100, None, -0.4, "acceptor", C_CAPTURE, C_CAPTURE),)},
    "Auger only": {"B": 0.0, "Cn": SI_CN, "Cp": SI_CP, "ND": 1e18},
    "traps only": {
        "B": 0.0, "NA": 1e17, "traps": ((300, None, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),)},
    "GaAs p-type, tiny minority": {"ni": GAAS_NI, "B": GAAS_B, "NA": 1e17},
    "with an empty level (T = 0)": {"NA": 1e17, "traps": (
        (0, None, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),
        (30, None, 0.2, "donor", C_CAPTURE, 0.1 * C_CAPTURE))},
}


# --------------------------------------------------------------------------------------------
# Steady state
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("light", [0.0, 1e21, 1e26], ids=["dark", "light", "strong light"])
@pytest.mark.parametrize("case", list(SWEEP))
def test_steady_state_sweep(case, light):
    model = make_model(G=light, **SWEEP[case])
    x, empty = cont.steady_state(model, with_empty=True)
    cap = model.capacity
    traps = cap >= 0
    assert np.all(np.isfinite(x)) and np.all(x >= 0)
    assert np.all(x[traps] <= cap[traps]) and np.all(empty[traps] >= 0)
    # conservation of charge (physics notes): exact up to rounding of the sum
    scale = np.abs(x).sum() + abs(model.charge) + 1.0
    assert abs(model.charge_of(x) - model.charge) <= 1e-12 * scale
    # drift ~ 0 relative to the largest channel rate.  The returned counts hold M_k only, so a
    # level full to within its rounding (T_k - M_k ~ ulp(T_k)) shows a larger model.drift;
    # that case is checked through the exact empty count below.
    w = model.rates(x)
    if case != "full deep level, n-type 1e19":
        assert np.max(np.abs(model.drift(x))) <= 1e-9 * w.max()
    if light == 0.0:
        # Detailed balance (physics notes): mass action N_e N_h = (n_i V)^2, and each level's
        # occupancy is Shockley-Read's M/T = n/(n + n1), empty E/T = n1/(n + n1)
        # (Shockley & Read, Phys. Rev. 87, 835, 1952), whatever the doping and trap mix.
        mat, vol = model.scenario.material, model.volume_cm3
        ni_v = mat.intrinsic_density_cm3 * vol
        assert rel(x[0] * x[1], ni_v**2) <= 1e-10
        n = x[0] / vol
        for k, trap in enumerate(model.scenario.traps):
            total = model.counts.traps[k]
            if total == 0:
                assert x[2 + k] == 0.0
                continue
            n1, _ = cont.trap_n1_p1(trap, mat)
            assert rel(x[2 + k], total * n / (n + n1)) <= 1e-10
            assert rel(empty[2 + k], total * n1 / (n + n1)) <= 1e-10
    # the linear-noise covariance exists and the charge does not fluctuate (conservation)
    res = cont.lna(model)
    assert np.all(res.relaxation_times > 0)
    wts = model.charge_weights.astype(float)
    assert np.max(np.abs(res.covariance @ wts)) <= 1e-10 * np.max(np.abs(res.covariance))


def test_steady_state_agrees_with_long_transient():
    """Independent path: the rate equations integrated for 60 slowest relaxation times reach
    the steady state (residual e^-60 ~ 1e-26; the integrator runs at rtol 1e-9, so 1e-6 is
    a safe bound on the accumulated error)."""
    demo_like = {"G": 1e22, "NA": 1e17, "V": 1e-15,  # as the bundled p-type demo box
                 "traps": ((None, 3e16, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),)}
    for kw in ({"G": 1e21, "traps": FIVE_LEVELS}, demo_like):
        model = make_model(**kw)
        xss = cont.steady_state(model)
        x0 = cont.equilibrium(model)
        tau = cont.lna(model).relaxation_times[0]
        xt = cont.transient(model, x0, np.array([0.0, 60.0 * tau]))
        np.testing.assert_array_equal(xt[0], x0)
        np.testing.assert_allclose(xt[-1], xss, rtol=1e-6, atol=0)


def test_steady_state_equals_srh_rate_under_light():
    """Shockley-Read-Hall (Shockley & Read, Phys. Rev. 87, 835, 1952; Hall, Phys. Rev. 87,
    387, 1952): with the level's occupancy in steady state, the net electron capture rate per
    volume equals U = (n p - n_i^2) / (tau_p0 (n + n1) + tau_n0 (p + p1)), and with the trap
    the only recombination path it equals the generation G.  Many-trap limit: V = 1e-9 cm^3
    holds 1e4 traps, N_t = 1e13 << N_A = 1e16 cm^-3.  The identity is exact for the continuum
    steady state, so it is checked at the solver's accuracy (1e-9)."""
    G = 1.0e19
    model = make_model(B=0.0, NA=1e16, V=1e-9, G=G,
                       traps=((None, 1e13, 0.1, "acceptor", C_CAPTURE, 2 * C_CAPTURE),))
    vol = model.volume_cm3
    x = cont.steady_state(model)
    n, p = x[0] / vol, x[1] / vol
    trap = model.scenario.traps[0]
    n1, p1 = cont.trap_n1_p1(trap, model.scenario.material)
    tau_n0, tau_p0 = cont.srh_lifetimes(trap, model.counts.traps[0] / vol)
    u = cont.srh_rate(n, p, SI_NI, n1, p1, tau_n0, tau_p0)
    net_e = (rate_of(model, x, "L0: electron capture")
             - rate_of(model, x, "L0: electron emission")) / vol
    net_h = (rate_of(model, x, "L0: hole capture")
             - rate_of(model, x, "L0: hole emission")) / vol
    assert n > 100 * SI_NI**2 / 1e16  # well away from equilibrium
    assert rel(net_e, u) <= 1e-9
    assert rel(net_h, u) <= 1e-9
    assert rel(u, G) <= 1e-9


@pytest.mark.parametrize(
    "ni, B, NA, V",
    [
        (SI_NI, SI_B, 1e16, 1e-3),  # Si: n0 V = 1e4 cm^-3 x 1e-3 cm^3 = 10 electrons
        (GAAS_NI, GAAS_B, 1e15, 1e3),  # GaAs: n0 V = 4.41e-3 cm^-3 x 1e3 cm^3 = 4.4 electrons
    ],
    ids=["Si", "GaAs"],
)
def test_equilibrium_mass_action_p_type(ni, B, NA, V):
    """n0 p0 = n_i^2 and the minority density n0 = n_i^2 / N_A in p-type material (common
    practice); n_i and B from the sources in the module docstring.  Exactly n0 = n_i^2/p0
    with p0 = N_A + n0, so n_i^2/N_A is off by n0/N_A (1e-12 for Si, 4e-18 for GaAs)."""
    model = make_model(ni=ni, B=B, NA=NA, V=V, G=1e15)  # light is switched off below
    x = cont.equilibrium(model)
    n0, p0 = x[0] / V, x[1] / V
    assert rel(n0 * p0, ni**2) <= 1e-10
    assert rel(n0, ni**2 / NA) <= 1e-10 + n0 / NA
    assert x[0] >= 1.0  # counts meaningful in this volume
    # equilibrium() is the steady state of the dark model
    np.testing.assert_array_equal(x, cont.steady_state(with_light_off(model)))


def test_equilibrium_intrinsic():
    """Intrinsic material: n0 = p0 = n_i (definition of n_i)."""
    model = make_model(V=1e-12)
    x = cont.equilibrium(model)
    np.testing.assert_allclose(x / 1e-12, [SI_NI, SI_NI], rtol=1e-12)


def test_no_steady_state_raises():
    """Light with no recombination path: carriers are produced and never lost."""
    model = make_unchecked_model(B=0.0, G=1e20)
    with pytest.raises(cont.ContinuumError, match="never lost"):
        cont.steady_state(model)
    model = make_unchecked_model(B=0.0, G=1e20, NA=1e17,
                                 traps=((100, None, 0.0, "acceptor", C_CAPTURE, 0.0),))
    with pytest.raises(cont.ContinuumError, match="holes"):
        cont.steady_state(model)


def test_steady_state_from_start_value_and_empty_model():
    model = make_model(G=1e21, NA=1e17, traps=((300, None, 0.0, "acceptor", C_CAPTURE,
                                                C_CAPTURE),))
    x = cont.steady_state(model)
    start = model.nearest_neutral_state(x).astype(float) + np.array([5.0, 5.0, 0.0])
    np.testing.assert_allclose(cont.steady_state(model, x0=start), x, rtol=1e-10)
    # no channel at all: nothing moves; the mass-action state is returned
    quiet = make_unchecked_model(B=0.0, NA=1e17)
    xq = cont.steady_state(quiet)
    assert abs(quiet.charge_of(xq) - quiet.charge) <= 1e-12 * abs(quiet.charge)
    assert np.all(cont.lna(quiet).covariance == 0.0)


def test_steady_state_relaxation_path_agrees():
    """The solver's fallback (stiff integration of the rate equations in log variables, then
    Newton) reaches the same steady state as Newton from the dark equilibrium: two
    independent routes to one root, checked at the solver accuracy 1e-9."""
    for kw in ({"G": 1e21, "traps": FIVE_LEVELS}, {"G": 1e26, "V": 1e-13},
               {"G": 1e22, "ND": 1e19, "traps": FIVE_LEVELS}):
        model = make_model(**kw)
        system, z0 = cont._setup(model, None)
        z, ok = cont._newton(system, cont._relax(system, z0))
        assert ok
        np.testing.assert_allclose(system.balance(z).x, cont.steady_state(model), rtol=1e-9)


def test_extra_conservation_law():
    """No pair channel, one level that exchanges only electrons and one only holes: besides
    the charge, N_e + M_1 is conserved (and so N_h - M_2).  The steady state keeps the values
    of the start state and neither combination fluctuates in the linear-noise answer."""
    model = make_model(B=0.0, NA=1e17, V=1e-15, traps=(
        (300, None, 0.0, "acceptor", C_CAPTURE, 0.0),
        (200, None, 0.1, "donor", 0.0, C_CAPTURE)))
    x = cont.steady_state(model)
    start = x + np.array([5.0, 0.0, -5.0, 0.0])  # same charge, other N_e + M_1
    y = cont.steady_state(model, x0=start)
    assert rel(y[0] + y[2], start[0] + start[2]) <= 1e-12
    assert rel(y[1] - y[3], start[1] - start[3]) <= 1e-12
    assert np.max(np.abs(model.drift(y))) <= 1e-9 * model.rates(y).max()
    cov = cont.lna(model, y).covariance
    for law in ([1.0, 0.0, 1.0, 0.0], [0.0, 1.0, 0.0, -1.0], model.charge_weights):
        assert np.max(np.abs(cov @ np.asarray(law, float))) <= 1e-12 * np.abs(cov).max()


# --------------------------------------------------------------------------------------------
# Transient
# --------------------------------------------------------------------------------------------


def test_transient_srh_decay_is_exponential():
    """Excess electrons in p-type material decay as exp(-t/tau), tau = 1/(c_n N_t) in low
    injection (common practice; Shockley & Read 1952).  Design-note example: sigma = 1e-15
    cm^2, v_th = 1e7 cm/s, N_t = 1e15 cm^-3 -> tau = 100 ns.

    Neglected terms (relative change of the decay rate), from the numbers below:
    trap occupancy in equilibrium m0/N_t = n0/(n0 + n1) ~ 1e-7; extra occupancy while holes
    empty the traps, dm/N_t <= (dn0/N_t) (c_n N_t)/(c_p p0) = 1e-4 x 1e-2 = 1e-6; re-emission
    c_n n1 dm / (c_n N_t dn) <= (n1/N_t) 1e-2 = 1e-7.  So the exponent is off by at most
    eps t/tau with eps = 1.2e-6; at t = 5 tau that is 6e-6, checked against 2 eps t/tau."""
    text = scenario_text(B=0.0, NA=1e17, V=1e-9) + """
[[traps]]
label = "L0"
density_cm3 = 1.0e15
energy_eV = 0.0
kind = "acceptor"
electron_cross_section_cm2 = 1.0e-15
hole_cross_section_cm2 = 1.0e-15
thermal_velocity_cm_s = 1.0e7
"""
    model = grmc.build_model(grmc.load_scenario(text=text))
    trap = model.scenario.traps[0]
    tau_n0, tau_p0 = cont.srh_lifetimes(trap, 1.0e15)
    assert rel(tau_n0, 1.0e-7) <= 1e-14 and rel(tau_p0, 1.0e-7) <= 1e-14
    x_eq = cont.equilibrium(model)
    dn0 = 1.0e11 * model.volume_cm3  # 100 excess pairs
    x0 = x_eq + np.array([dn0, dn0, 0.0])
    t = np.linspace(0.0, 5.0 * tau_n0, 51)
    xt = cont.transient(model, x0, t)
    dn = xt[:, 0] - x_eq[0]
    eps = 1.2e-6
    err = np.abs(np.log(dn / dn0) + t / tau_n0)
    assert np.all(err <= 2.0 * eps * t / tau_n0 + 1e-9)  # + integrator rtol
    # charge is kept along the way (linear invariant of the BDF method)
    charges = xt @ model.charge_weights
    assert np.max(np.abs(charges - model.charge)) <= 1e-9 * np.abs(x0).sum()


@pytest.mark.parametrize("method", ["BDF", "Radau", "LSODA"])
def test_transient_radiative_exact_solution(method):
    """Radiative recombination only, excess d of pairs in p-type material (dark):
    d' = -k d - b d^2 with b = B/V, k = b (n0 + p0) (counts), whose exact solution is
    d(t) = k d0 e^{-kt} / (k + b d0 (1 - e^{-kt})) (Bernoulli equation).  Checked at 1e-7,
    a hundred times the integrator's relative tolerance."""
    vol = 1e-12
    model = make_model(NA=1e17, V=vol)
    x_eq = cont.equilibrium(model)
    d0 = 3.0e4  # high injection: d0 / p0 = 0.3, far from linear
    b = SI_B / vol
    k = b * (x_eq[0] + x_eq[1])
    t = np.linspace(0.0, 3.0 / k, 31)
    xt = cont.transient(model, x_eq + d0, t, method=method)
    exact = k * d0 * np.exp(-k * t) / (k + b * d0 * (1.0 - np.exp(-k * t)))
    np.testing.assert_allclose(xt[:, 0] - x_eq[0], exact, rtol=1e-7)
    np.testing.assert_allclose(xt[:, 1] - x_eq[1], exact, rtol=1e-7)


# --------------------------------------------------------------------------------------------
# Linear-noise approximation
# --------------------------------------------------------------------------------------------


def birth_death_model():
    # Electrons in heavily doped p-type Si under light, radiative only: loss B N_h N_e / V is
    # first order in N_e because N_h = 1e6 >> N_e ~ 21 (generation G V + B n_i^2 V constant).
    return make_model(NA=1e18, V=1e-12, G=1e17)


def test_lna_birth_death_variance_is_mean():
    """A linear birth-death process is Poisson: var = mean (van Kampen, Stochastic Processes
    in Physics and Chemistry).  Here the loss is B N_e N_h / V with N_h = N_e + A, and the
    linear-noise variance is exactly N_e N_h / (N_e + N_h) (one reduced variable,
    A_r = -b (N_e + N_h), D_r = 2 b N_e N_h), i.e. mean x (1 - N_e/(N_e + N_h)): the
    correction to var = mean is N_e/N_h ~ 2e-5 < 1e-4."""
    model = birth_death_model()
    res = cont.lna(model)
    ne, nh = res.mean[0], res.mean[1]
    assert ne / nh < 1e-4
    var = res.covariance[0, 0]
    assert abs(var / ne - 1.0) <= ne / nh  # van Kampen: Poisson, to the order N_e/N_h
    assert rel(var, ne * nh / (ne + nh)) <= 1e-10  # exact linear-noise value (derived above)


def test_lna_psd_is_van_vliet_lorentzian():
    """One-variable G-R noise: S_N(f) = 4 var tau / (1 + (2 pi f tau)^2) with
    1/tau = r' - g' and var = g / (r' - g') at the steady state (K. M. van Vliet, Proc. IRE
    46, 1004, 1958; from memory).  g, r and their derivatives along the conserved charge
    (dN_h/dN_e = 1) are taken from the model's rate laws; the identity is exact algebra, so it
    is checked at 1e-10."""
    model = birth_death_model()
    x = cont.steady_state(model)
    w, dw = model.rates(x), model.rate_jacobian(x)
    nu_e = model.stoich[:, 0]
    along = dw @ np.array([1.0, 1.0])  # d w_r / d N_e with N_h = N_e + const
    g = float(w[nu_e > 0] @ nu_e[nu_e > 0])
    g1 = float(along[nu_e > 0] @ nu_e[nu_e > 0])
    r1 = float(along[nu_e < 0] @ -nu_e[nu_e < 0])
    tau = 1.0 / (r1 - g1)
    var = g / (r1 - g1)
    f = np.logspace(-3, 3, 25) / (2 * np.pi * tau)
    s = cont.lna_psd(model, f, x=x)
    lorentz = 4.0 * var * tau / (1.0 + (2 * np.pi * f * tau) ** 2)
    np.testing.assert_allclose(s[0, 0].real, lorentz, rtol=1e-10)
    np.testing.assert_allclose(s[0, 0].imag, 0.0, atol=1e-12 * lorentz.max())
    res = cont.lna(model, x)
    assert rel(res.relaxation_times[0], tau) <= 1e-12
    assert rel(res.covariance[0, 0], var) <= 1e-10


def test_lna_pair_channels_equal_variances():
    """With pair channels only, N_h = N_e - const: var(N_e) == var(N_h) == cov (physics
    notes, conservation and the linear-noise approximation)."""
    model = make_model(ND=3e17, Cn=SI_CN, Cp=SI_CP, G=1e22, V=1e-15)
    cov = cont.lna(model).covariance
    assert rel(cov[1, 1], cov[0, 0]) <= 1e-10
    assert rel(cov[0, 1], cov[0, 0]) <= 1e-10
    s = cont.lna_psd(model, np.logspace(3, 9, 7))
    np.testing.assert_allclose(s[1, 1], s[0, 0], rtol=1e-10)


def test_lna_parseval():
    """Parseval: the integral of the one-sided spectral matrix over f in (0, inf) equals the
    covariance (docs/physics-notes.md).  Integrated in u = ln f over 12 decades around the corner
    frequencies, with the tails added analytically (flat below, 1/f^2 above); the tails'
    error is below 1e-12 and quad runs at epsrel 1e-10, so 1e-8 is checked."""
    model = make_model(NA=1e16, V=1e-14, G=1e21, traps=(
        (50, None, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),
        (20, None, 0.3, "donor", 0.1 * C_CAPTURE, C_CAPTURE)))
    res = cont.lna(model)
    f_lo = 1e-6 / (2 * np.pi * res.relaxation_times[0])
    f_hi = 1e6 / (2 * np.pi * res.relaxation_times[-1])
    pairs = [(i, i) for i in range(model.n_species)] + [(0, 1), (0, 2), (2, 3)]
    for i, j in pairs:
        def integrand(u, i=i, j=j):
            f = math.exp(u)
            return float(cont.lna_psd(model, [f], x=res.mean)[i, j, 0].real) * f

        # quad may warn that roundoff limits its own error estimate (scipy >= 1.17 on the
        # cross terms); the assertion below checks the integral itself, so the warning is
        # not an error here
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", IntegrationWarning)
            body = quad(integrand, math.log(f_lo), math.log(f_hi), limit=400,
                        epsabs=0.0, epsrel=1e-10)[0]
        s_lo, s_hi = (cont.lna_psd(model, [f_lo, f_hi], x=res.mean)[i, j].real)
        total = body + s_lo * f_lo + s_hi * f_hi
        assert abs(total - res.covariance[i, j]) <= 1e-8 * abs(res.covariance[i, i])


def test_lyapunov_cross_check_other_reduction():
    """Independent solve: A and D built from the model's public rate laws, electrons
    (instead of holes) eliminated through the charge, the reduced Lyapunov equation solved
    through Kronecker products with numpy.linalg.solve, mapped back; the covariance does not
    depend on the species eliminated."""
    model = make_model(NA=1e17, V=1e-15, G=1e22, traps=(
        (None, 3e16, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),))
    x = cont.steady_state(model)
    res = cont.lna(model, x)
    nu = model.stoich.astype(float)
    amat = nu.T @ model.rate_jacobian(x)
    dmat = nu.T @ np.diag(model.rates(x)) @ nu
    np.testing.assert_allclose(res.jacobian, amat, rtol=1e-12, atol=1e-12 * np.abs(amat).max())
    np.testing.assert_allclose(res.diffusion, dmat, rtol=1e-12, atol=1e-12 * np.abs(dmat).max())
    # N_e = N_h - M + charge: independent species (holes, trapped)
    proj = np.array([[1.0, -1.0], [1.0, 0.0], [0.0, 1.0]])
    ind = [1, 2]
    a_r = amat[ind] @ proj
    d_r = dmat[np.ix_(ind, ind)]
    eye = np.eye(2)
    kron = np.kron(eye, a_r) + np.kron(a_r, eye)
    s_r = np.linalg.solve(kron, -d_r.reshape(-1)).reshape(2, 2)
    cov = proj @ s_r @ proj.T
    np.testing.assert_allclose(res.covariance, cov, rtol=1e-9, atol=1e-12 * np.abs(cov).max())
    # the reduced system the result reports is the one it solved
    s_rep = res.projection @ np.linalg.solve(
        np.kron(eye, res.reduced_jacobian) + np.kron(res.reduced_jacobian, eye),
        -res.reduced_diffusion.reshape(-1)).reshape(2, 2) @ res.projection.T
    np.testing.assert_allclose(res.covariance, s_rep, rtol=1e-9, atol=1e-12 * np.abs(cov).max())
    assert list(res.dependent) == [1]  # holes eliminated


def test_lna_frozen_level_has_no_variance():
    """A level with T_k = 0 has no channels: its count is 0 and does not fluctuate."""
    model = make_model(NA=1e17, G=1e21, traps=(
        (0, None, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),
        (30, None, 0.2, "donor", C_CAPTURE, C_CAPTURE)))
    res = cont.lna(model)
    assert res.mean[2] == 0.0
    assert np.all(res.covariance[2] == 0.0) and np.all(res.covariance[:, 2] == 0.0)
    assert res.covariance[3, 3] > 0.0
    s = cont.lna_psd(model, [1.0, 1e6])
    assert np.all(s[2] == 0.0) and np.all(s[:, 2] == 0.0)


def test_lna_unstable_state_raises():
    """The LNA exists only about a stable state; a state with negative counts is not one."""
    model = make_model(NA=1e17, G=1e21)
    x = cont.steady_state(model)
    bad = x.copy()
    bad[0], bad[1] = -1e3, x[1] - x[0] - 1e3
    with pytest.raises(cont.ContinuumError, match="not a stable"):
        cont.lna(model, bad)


def test_lna_refuses_unresolvable_time_scales():
    """A donor level that exchanges only holes, in intrinsic GaAs: holes (3e-15 of them) and
    the traps equilibrate within a microsecond, while electrons change only through pair
    channels of rate ~ B n_i^2 V = 3e-10 /s.  The slow rate is below the rounding of the fast
    one, so the covariance is refused rather than returned wrong.  With electron capture on,
    the same volume is resolved."""
    traps = ((10_000, None, 0.3, "donor", 0.0, C_CAPTURE),)
    model = make_model(ni=GAAS_NI, B=GAAS_B, V=1e-13, traps=traps)
    cont.steady_state(model)  # the steady state itself is fine
    with pytest.raises(cont.ContinuumError, match="double precision"):
        cont.lna(model)
    traps = ((10_000, None, 0.3, "donor", C_CAPTURE, C_CAPTURE),)
    assert np.all(cont.lna(make_model(ni=GAAS_NI, B=GAAS_B, V=1e-13, traps=traps))
                  .relaxation_times > 0)


# --------------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------------


def test_srh_helpers():
    """n1 p1 = n_i^2 and n1 = p1 = n_i at mid-gap (Shockley & Read 1952); U = 0 in
    equilibrium; tau_n0 = 1/(c_n N_t) = 100 ns for the design-note example."""
    model = make_model(traps=((1, None, 0.25, "acceptor", C_CAPTURE, 0.5 * C_CAPTURE),))
    trap, mat = model.scenario.traps[0], model.scenario.material
    n1, p1 = cont.trap_n1_p1(trap, mat)
    assert rel(n1 * p1, SI_NI**2) <= 1e-14 and n1 > SI_NI > p1
    mid = make_model(traps=((1, None, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),))
    assert cont.trap_n1_p1(mid.scenario.traps[0], mat) == (SI_NI, SI_NI)
    tau_n0, tau_p0 = cont.srh_lifetimes(trap, 1e15)
    assert rel(tau_n0, 1e-7) <= 1e-14 and rel(tau_p0, 2e-7) <= 1e-14
    assert cont.srh_rate(1e5, SI_NI**2 / 1e5, SI_NI, n1, p1, tau_n0, tau_p0) == pytest.approx(
        0.0, abs=1e-20)
    u = cont.srh_rate(np.array([1e12, 1e14]), 1e16, SI_NI, n1, p1, tau_n0, tau_p0)
    assert u.shape == (2,) and np.all(u > 0)


def test_low_injection_lifetime_p_type():
    """In p-type material the low-injection SRH lifetime is the minority-electron lifetime
    tau_n0 (Shockley & Read 1952); the exact small-signal expression differs from it by
    ((n0 + n1) tau_p0/tau_n0 + p1)/p0 = 2e-7 here (mid-gap level, N_A = 1e17)."""
    model = make_model(B=0.0, NA=1e17, V=1e-9, traps=(
        (None, 1e13, 0.0, "acceptor", C_CAPTURE, C_CAPTURE),))
    tau = cont.low_injection_lifetime(model)
    assert rel(tau, 1.0 / (C_CAPTURE * 1e13)) <= 2.1e-7
    with pytest.raises(ValueError):
        cont.low_injection_lifetime(make_model())


def test_total_event_rate():
    model = make_model(NA=1e17, G=1e21, traps=((30, None, 0.0, "acceptor", C_CAPTURE,
                                                C_CAPTURE),))
    x = cont.steady_state(model)
    exact = model.propensities(model.nearest_neutral_state(x)).sum()
    assert cont.total_event_rate(model, x) == pytest.approx(exact, rel=1e-15)
    assert cont.total_event_rate(model, x, law="macro") == pytest.approx(
        model.rates(x).sum(), rel=1e-15)
