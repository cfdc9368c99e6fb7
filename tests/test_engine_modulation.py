"""The engine's optional time-modulated channel (thinning) and flow recording.

Each check names its reference.  Statistical checks use fixed seeds and independent
replicate trajectories (stream index i of one seed); the standard error of an estimate is
the spread of the per-trajectory values over sqrt(replicates).  The bound is Z = 4
standard errors (two-sided p = 6e-5 per check for a correct engine).
"""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pytest
from test_engine import SMALL_TOML, _model, _same

from grmc.engine import kernels, oracle, rng

Z = 4.0

#: Heavily p-type box (A = 1e20 cm^-3 in 1e-15 cm^3: 1e5 holes), radiative and light only:
#: a linear birth-death process for the electrons, birth g = G V = 5e10 /s (thermal pair
#: generation B n_i^2 V = 1e-13 /s is negligible), death k N_e with k = B A / V = 1e10 /s
#: (to within N_e / A = 5e-5).  Channels: 0 thermal generation, 1 radiative, 2 optical.
BIRTH_DEATH_TOML = """
title = "birth-death under modulated light"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e6
radiative_cm3_s = 1.0e-10
acceptors_cm3 = 1.0e20
[volume]
volume_cm3 = 1.0e-15
[light]
generation_cm3_s = 5.0e25
"""
G_V = 5.0e25 * 1.0e-15
K = 1.0e-10 * 1.0e20
OPTICAL = 2


@pytest.fixture(scope="module")
def small():
    m = _model(SMALL_TOML)
    return m, kernels.kernel_arrays(m), m.nearest_neutral_state([3.0, 25.0, 1.0])


@pytest.fixture(scope="module")
def birth_death():
    m = _model(BIRTH_DEATH_TOML)
    assert m.channel_names[OPTICAL] == "optical generation" and m.n_channels == 3
    arr = kernels.kernel_arrays(m)
    assert math.isclose(arr[1][OPTICAL], G_V, rel_tol=1e-12)
    A = m.counts.acceptors
    return arr, m.nearest_neutral_state([G_V / K, A + G_V / K])


def _se_check(est: np.ndarray, ref, what: str) -> None:
    """Mean of the per-trajectory estimates (rows) within Z standard errors of ref."""
    est = np.atleast_2d(np.asarray(est, dtype=float).T).T
    se = est.std(axis=0, ddof=1) / math.sqrt(est.shape[0])
    dev = np.abs(est.mean(axis=0) - ref)
    assert np.all(dev < Z * se), (what, est.mean(axis=0), ref, se)


# ------------------------------------------------------------------------------ unchanged
#: A run recorded with the engine as it was before the options existed (commit e9a5d36):
#: SMALL_TOML, stream (77, 3), settle 2e-8 s, excess (2, 2, 0), window 1e-6 s, 16 x 4 bins.
STORED_EVENTS = [0, 0, 193, 0, 0, 1, 0, 193, 0, 193, 0]
STORED_FINAL = [1, 23, 0]
STORED_RNG = [8835712392012639043, 14318612691945091687, 16551943302541621447,
              17111047518529435246]
STORED_INTEG = ["0x1.ce95c73b7034fp-21", "0x1.826b24cfdfcccp-16", "0x1.6e976330f0810p-23"]
STORED_SHA256 = "8b7012933061d63e402cf44c8e087dd9ff8ac842326c902fd6c5d9084c9ddb92"


@pytest.mark.parametrize("engine", [kernels, oracle])
def test_without_options_the_stored_run_is_reproduced(small, engine):
    """Without modulation and flows the draw order is the old one: the kernel and the oracle
    reproduce, bit for bit, a run stored before the change (integers exactly, the integrals
    by their hex digits, all six arrays by SHA-256 of their bytes); ``flows`` is empty, and
    passing None explicitly changes nothing."""
    _, arr, x0 = small
    kw = {"x0": x0, "settle_s": 2e-8, "excess": [2, 2, 0], "duration_s": 1e-6,
          "n_samples": 16, "oversample": 4}
    r = engine.simulate(*arr, rng_state=rng.stream_state(77, 3), **kw)
    assert r.n_events == 580 and r.events.tolist() == STORED_EVENTS
    assert r.final.tolist() == STORED_FINAL
    assert [int(v) for v in r.rng_state] == STORED_RNG
    assert [float(v).hex() for v in r.integ] == STORED_INTEG
    h = hashlib.sha256()
    for name in r._fields[:6]:
        h.update(np.ascontiguousarray(getattr(r, name)).tobytes())
    assert h.hexdigest() == STORED_SHA256
    assert r.flows.shape == (0,) and r.flows.dtype == np.float64
    assert r._fields[-1] == "flows" and r._fields[:8] == (
        "samples", "bins", "integ", "integ2", "events", "final", "n_events", "rng_state")
    _same(r, engine.simulate(*arr, rng_state=rng.stream_state(77, 3), modulation=None,
                             flow_weight=None, **kw))


# ------------------------------------------------------------------------------ oracle
@pytest.mark.parametrize("modulation, flows", [
    ((2, kernels.SINE, 3.0e6, 0.7, 0.3), True),          # light, sine
    ((7, kernels.SQUARE, 5.0e6, 1.0, 0.0), True),         # electron capture, full square
    (kernels.Modulation(9, kernels.SQUARE, 2.0e7, 0.4, -1.0), False),
    (None, True),                                         # flows alone
])
def test_kernel_equals_oracle_with_options(small, modulation, flows):
    """Every kernel has an oracle (DEVELOPERS.md), extended: kernel and plain-Python oracle are bit-identical with a
    modulated channel (sine, square; thinning draws a third uniform, module notes step 5a)
    and with flow recording, through settling (where the modulation runs on window time
    t - settle_s) and an excess; the stream ends in the same state."""
    _, arr, x0 = small
    weight = np.arange(11) - 3 if flows else None
    kw = {"x0": x0, "settle_s": 3e-8, "excess": [2, 2, 0], "duration_s": 2e-6,
          "n_samples": 16, "oversample": 4, "modulation": modulation, "flow_weight": weight}
    st1, st2 = rng.stream_state(12, 1), rng.stream_state(12, 1)
    r1 = kernels.simulate(*arr, rng_state=st1, **kw)
    r2 = oracle.simulate(*arr, rng_state=st2, **kw)
    assert r1.n_events > 500 and r1.n_events == r1.events.sum()
    _same(r1, r2)
    assert np.array_equal(st1, st2)
    assert r1.flows.shape == ((64,) if flows else (0,))
    if modulation is not None:  # the extra draws moved the stream
        plain = kernels.simulate(*arr, rng_state=rng.stream_state(12, 1),
                                 **{**kw, "modulation": None})
        assert not np.array_equal(plain.rng_state, r1.rng_state)


# ------------------------------------------------------------------------------ flows
def test_flows_add_up_and_sit_in_the_right_bins(small):
    """Definition of flows: sum(flows) = flow_weight @ events exactly; with the electrons'
    stoichiometry as weights, the running sum of flows up to fine bin k * oversample - 1
    is N_e(t_k) - N_e(0) exactly (an event at t counts in the bin with e_j < t <= e_{j+1},
    the sample at an edge includes the events at times <= the edge: right-continuous)."""
    m, arr, x0 = small
    for weight in (m.stoich[:, 0], np.array([5, -2, 0, 7, 1, 1, 3, -9, 4, 2, 11])):
        r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(13, 0), settle_s=1e-8,
                             excess=[3, 3, 0], duration_s=2e-6, n_samples=32, oversample=5,
                             flow_weight=weight)
        assert r.flows.shape == (160,) and np.all(r.flows == np.round(r.flows))
        assert r.flows.sum() == float(weight @ r.events)
    r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(13, 1), settle_s=1e-8,
                         duration_s=2e-6, n_samples=32, oversample=5,
                         flow_weight=m.stoich[:, 0])
    cum = np.cumsum(r.flows)
    assert np.array_equal(cum[5 * np.arange(1, 32) - 1], r.samples[1:, 0] - r.samples[0, 0])
    assert cum[-1] == r.final[0] - r.samples[0, 0]


def test_invalid_options_are_refused(small):
    """Refuse untrustworthy inputs: a depth outside [0, 1] (h < 0),
    an unknown kind, a channel out of range, a negative frequency, flow weights of the
    wrong shape or not integers."""
    _, arr, x0 = small
    kw = {"x0": x0, "rng_state": rng.stream_state(1, 0), "duration_s": 1e-8, "n_samples": 2}
    for mod in ((2, 1, 1e6, 1.5, 0.0), (2, 3, 1e6, 0.5, 0.0), (11, 1, 1e6, 0.5, 0.0),
                (2, 1, -1e6, 0.5, 0.0), (2, 1, 1e6, 0.5, math.nan), (2, 1, 1e6)):
        with pytest.raises(ValueError):
            kernels.simulate(*arr, modulation=mod, **kw)
    for w in (np.ones(10, dtype=np.int64), np.full(11, 0.5)):
        with pytest.raises(ValueError):
            kernels.simulate(*arr, flow_weight=w, **kw)


# ------------------------------------------------------------------------------ exactness
def _bin_average_of_sin_cos(w: float, edges: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Exact averages of sin(w t) and cos(w t) over each bin [e_j, e_j+1]."""
    width = np.diff(edges)
    s = (np.cos(w * edges[:-1]) - np.cos(w * edges[1:])) / (w * width)
    c = (np.sin(w * edges[1:]) - np.sin(w * edges[:-1])) / (w * width)
    return s, c


def test_sine_modulated_light_drives_the_birth_death_process(birth_death):
    """Thinning exactness (Lewis & Shedler, Naval Res. Logist. Q. 26, 403, 1979) on the
    birth-death process with the light modulated as g(t) = g (1 + m sin(w t)), m = 0.8,
    w = k (so the response lags by 45 degrees), 50 periods per trajectory, 32 replicates,
    seed 61, 2 ns (20 lifetimes) of modulated settling.

    1. Generation events per fine bin (flows, weight 1 on the light channel) are an
       inhomogeneous Poisson count with mean g * integral of (1 + m sin(w t)) over the bin
       (the exact rate; common practice): the per-trajectory least-squares coefficients on
       (1, bin-averaged sin, bin-averaged cos) match (g, g m, 0) times the bin width, and
       the events folded over one period (16 phase bins) match their exact means.
    2. The electrons' ensemble mean follows the periodic solution of dn/dt = g(t) - k n
       (closed form of a driven first-order system; common practice): n(t) = g/k + R sin(w t
       - psi), R = g m / sqrt(k^2 + w^2), psi = atan(w / k); i.e. coefficients
       (g/k, R cos psi, -R sin psi) on (1, sin, cos) of the exact bin averages.
    Within Z standard errors over the replicates."""
    arr, x0 = birth_death
    m_depth, w = 0.8, K
    f = w / (2.0 * math.pi)
    n_samples, oversample = 100, 8          # 800 fine bins = 16 per period
    duration = 50 * (2.0 * math.pi / w)
    n_bins = n_samples * oversample
    edges = duration * (np.arange(n_bins + 1) / n_bins)
    width = np.diff(edges)
    s_avg, c_avg = _bin_average_of_sin_cos(w, edges)
    basis = np.column_stack([np.ones(n_bins), s_avg, c_avg])
    weight = np.zeros(3, dtype=np.int64)
    weight[OPTICAL] = 1
    gen_coef, n_coef, folded = [], [], []
    for i in range(32):
        r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(61, i), settle_s=2e-9,
                             duration_s=duration, n_samples=n_samples, oversample=oversample,
                             modulation=(OPTICAL, kernels.SINE, f, m_depth, 0.0),
                             flow_weight=weight)
        assert r.flows.sum() == r.events[OPTICAL]
        gen_coef.append(np.linalg.lstsq(basis * width[:, None], r.flows, rcond=None)[0])
        n_coef.append(np.linalg.lstsq(basis, r.bins[:, 0], rcond=None)[0])
        folded.append(r.flows.reshape(50, 16).sum(axis=0))
    g = G_V
    _se_check(np.array(gen_coef), [g, g * m_depth, 0.0], "generation rate")
    expected = g * (width + m_depth * s_avg * width)          # exact mean per fine bin
    folded = np.array(folded)
    _se_check(folded, expected.reshape(50, 16).sum(axis=0), "folded generation")
    psi = math.atan(w / K)
    amp = g * m_depth / math.hypot(K, w)
    assert abs(psi - math.pi / 4) < 1e-12 and amp > 2.0
    _se_check(np.array(n_coef), [g / K, amp * math.cos(psi), -amp * math.sin(psi)],
              "electron response")
    # the unmodulated answer (no lag, or the full static amplitude g m / k) would fail
    est = np.array(n_coef).mean(axis=0)
    assert abs(math.atan2(-est[2], est[1]) - psi) < 0.2
    assert abs(math.hypot(est[1], est[2]) - amp) < 0.1 * amp


def test_square_wave_light_half_periods(birth_death):
    """Square-wave light (50 % duty, depth 0.6, f = 1 GHz, 100 periods, 16 replicates,
    seed 71): generation events per half period average (1 + depth) g T/2 in the first
    half of each period (sin >= 0) and (1 - depth) g T/2 in the second (the exact Poisson
    means of a piecewise-constant rate; common practice), within Z standard errors; the
    total is g T per period."""
    arr, x0 = birth_death
    depth, f = 0.6, 1.0e9
    half = 0.5 / f
    weight = np.zeros(3, dtype=np.int64)
    weight[OPTICAL] = 1
    hi, lo = [], []
    for i in range(16):
        r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(71, i), settle_s=1e-9,
                             duration_s=100 / f, n_samples=100, oversample=2,
                             modulation=(OPTICAL, kernels.SQUARE, f, depth, 0.0),
                             flow_weight=weight)
        halves = r.flows.reshape(100, 2)
        hi.append(halves[:, 0].mean())
        lo.append(halves[:, 1].mean())
    _se_check(np.array(hi), (1 + depth) * G_V * half, "high half")
    _se_check(np.array(lo), (1 - depth) * G_V * half, "low half")
    assert abs(np.mean(hi) / np.mean(lo) - 4.0) < 0.3  # (1 + 0.6) / (1 - 0.6)
