"""The compiled event engine (grmc.engine): generator, kernel, oracle, recording, caching.

Each check names its reference.  Statistical checks use fixed seeds and independent
replicate trajectories (stream index i of one seed); the standard error of a time average is
the spread of the per-trajectory values over sqrt(replicates), which honours the
autocorrelation inside each trajectory.  The bound is Z = 4 standard errors (two-sided
p = 6e-5 per check for a correct engine).
"""

from __future__ import annotations

import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import special

import grmc
from grmc.engine import _jit, kernels, oracle, rng

Z = 4.0
ROOT = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------------------ helpers
def _model(text: str):
    return grmc.build_model(grmc.load_scenario(text=text))


#: A 60 nm p-type box (22 acceptors) with one acceptor-like trap level of 5 traps,
#: radiative, both Auger processes (coefficients raised so that they fire) and strong light.
SMALL_TOML = """
title = "engine test: small p-type box, trap, Auger, light"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 4.73e-15
auger_electron_cm6_s = 1.0e-28
auger_hole_cm6_s = 1.0e-28
acceptors_cm3 = 1.0e17
[volume]
size_nm = [60.0, 60.0, 60.0]
[[traps]]
label = "deep"
count = 5
energy_eV = 0.1
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
[light]
generation_cm3_s = 1.0e24
[run]
duration_s = 1.0e-6
"""


@pytest.fixture(scope="module")
def small():
    m = _model(SMALL_TOML)
    assert m.n_channels == 11  # every channel kind is present
    return m, kernels.kernel_arrays(m), m.nearest_neutral_state([3.0, 25.0, 1.0])


def _same(r1: kernels.TrajectoryResult, r2: kernels.TrajectoryResult) -> None:
    for name in r1._fields:
        a, b = np.asarray(getattr(r1, name)), np.asarray(getattr(r2, name))
        assert a.dtype == b.dtype, name
        assert np.array_equal(a, b), name  # bit for bit (float == float)


# ------------------------------------------------------------------------------ imports
def test_importing_the_engine_package_imports_no_numba():
    """DEVELOPERS.md: importing grmc (and grmc.engine) compiles nothing and imports no numba."""
    code = "import sys, grmc.engine; assert 'numba' not in sys.modules, 'numba imported'"
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT,
                   env={**os.environ, "PYTHONPATH": str(ROOT)})


# ------------------------------------------------------------------------------ generator
def _xoshiro256pp_reference(state: list[int], n: int) -> list[int]:
    """xoshiro256++ written out from the reference C code (Blackman & Vigna, ACM TOMS 47,
    2021; xoshiro256plusplus.c), with uint64_t arithmetic as Python ints mod 2^64:

        static inline uint64_t rotl(const uint64_t x, int k) {
            return (x << k) | (x >> (64 - k)); }
        uint64_t next(void) {
            const uint64_t result = rotl(s[0] + s[3], 23) + s[0];
            const uint64_t t = s[1] << 17;
            s[2] ^= s[0]; s[3] ^= s[1]; s[1] ^= s[2]; s[0] ^= s[3];
            s[2] ^= t;
            s[3] = rotl(s[3], 45);
            return result; }
    """
    m = 2**64 - 1
    s = list(state)

    def rotl(x, k):
        return ((x << k) & m) | (x >> (64 - k))

    out = []
    for _ in range(n):
        result = (rotl((s[0] + s[3]) & m, 23) + s[0]) & m
        t = (s[1] << 17) & m
        s[2] ^= s[0]
        s[3] ^= s[1]
        s[1] ^= s[2]
        s[0] ^= s[3]
        s[2] ^= t
        s[3] = rotl(s[3], 45)
        out.append(result)
    return out


def test_xoshiro256pp_known_answers():
    """Known answers of xoshiro256++ from state (1, 2, 3, 4).

    The first two follow by hand from the reference algorithm: rotl(1 + 4, 23) + 1 =
    5 * 2^23 + 1 = 41943041; after one step s = (7, 0, 262146, 211106232532992) and
    rotl(7 + 211106232532992, 23) + 7 = 58720359.  The ten values are the ones the reference
    C implementation produces, as published in the rand_xoshiro test suite
    (rust-random/rngs, Xoshiro256PlusPlus "reference" test).
    """
    expected = [41943041, 58720359, 3588806011781223, 3591011842654386,
                9228616714210784205, 9973669472204895162, 14011001112246962877,
                12406186145184390807, 15849039046786891736, 10450023813501588000]
    assert 5 * 2**23 + 1 == expected[0]
    assert _xoshiro256pp_reference([1, 2, 3, 4], 10) == expected
    state = np.array([1, 2, 3, 4], dtype=np.uint64)
    assert [int(rng.next_u64(state)) for _ in range(10)] == expected
    assert [rng.py_next_u64(py) for py in [[1, 2, 3, 4]] for _ in range(10)] == expected


def test_python_twin_equals_jitted_generator():
    """The oracle's generator is the kernel's: the first 1000 outputs (u64 and doubles) agree,
    and both agree with the reference steps written out above."""
    st = rng.stream_state(2024, 3)
    ref = _xoshiro256pp_reference(rng.py_state(st), 1000)
    py = rng.py_state(st)
    a = np.empty(1000, dtype=np.uint64)
    rng.fill_u64(st.copy(), a)
    assert [int(v) for v in a] == ref
    assert [rng.py_next_u64(py) for _ in range(1000)] == ref
    d = np.empty(1000)
    st2 = st.copy()
    rng.fill_double(st2, d)
    py2 = rng.py_state(st)
    assert [rng.py_next_double(py2) for _ in range(1000)] == d.tolist()
    assert rng.py_state(st2) == py2  # both advanced by the same 1000 steps
    # (x >> 11) * 2^-53: exactly the top 53 bits, in [0, 1)
    assert np.array_equal(d, np.array([float(v >> 11) for v in ref]) * 2.0**-53)
    assert d.min() >= 0.0 and d.max() < 1.0


def test_stream_state_is_seedsequence_and_distinct():
    """stream_state = SeedSequence(seed, spawn_key=(index, purpose)).generate_state(4, uint64)
    (numpy's documented construction of independent child streams)."""
    st = rng.stream_state(7, 5, purpose=1)
    ref = np.random.SeedSequence(7, spawn_key=(5, 1)).generate_state(4, np.uint64)
    assert st.dtype == np.uint64 and st.shape == (4,) and np.array_equal(st, ref)
    states = {tuple(rng.stream_state(7, i, purpose=p)) for i in range(50) for p in (0, 1)}
    assert len(states) == 100
    assert np.array_equal(rng.stream_state(7, 5, purpose=1), st)  # reproducible
    with pytest.raises(ValueError):
        rng.stream_state(-1, 0)


# ------------------------------------------------------------------------------ oracle
@pytest.mark.parametrize("settle_s, excess_pairs, duration_s, n_samples, oversample", [
    (2.0e-8, 3, 2.0e-6, 32, 4),    # settle, pulse, events denser than bins
    (0.0, 0, 3.0e-7, 1, 1),        # no settling, one sample
    (1.0e-8, 0, 2.0e-8, 64, 8),    # bins much denser than events
])
def test_kernel_equals_oracle(small, settle_s, excess_pairs, duration_s, n_samples, oversample):
    """Every kernel has an oracle (DEVELOPERS.md): the compiled kernel and its plain-Python oracle give identical
    trajectories for a seed (samples, bins, integrals, events, final state, stream state)."""
    m, arr, x0 = small
    excess = np.zeros(m.n_species, dtype=np.int64)
    excess[:2] = excess_pairs
    kw = {"x0": x0, "settle_s": settle_s, "excess": excess, "duration_s": duration_s,
          "n_samples": n_samples, "oversample": oversample}
    st1, st2 = rng.stream_state(5, 0), rng.stream_state(5, 0)
    r1 = kernels.simulate(*arr, rng_state=st1, **kw)
    r2 = oracle.simulate(*arr, rng_state=st2, **kw)
    assert r1.n_events > (100 if duration_s > 1e-7 else 0)
    _same(r1, r2)
    assert np.array_equal(st1, st2) and not np.array_equal(st1, rng.stream_state(5, 0))


def test_kernel_equals_oracle_with_three_trap_levels():
    """Kernel = oracle on a larger network: three trap levels (acceptor- and donor-like),
    donors, both Auger processes and light: 5 species, 19 channels (table padding, packing
    and the sorting search beyond the first four places)."""
    text = SMALL_TOML.replace('acceptors_cm3 = 1.0e17',
                              'acceptors_cm3 = 1.0e17\ndonors_cm3 = 2.0e16')
    for label, count, energy, kind in (("b", 3, -0.2, "donor"), ("c", 2, 0.3, "acceptor")):
        text = text.replace("[light]", f"""[[traps]]
label = "{label}"
count = {count}
energy_eV = {energy}
kind = "{kind}"
electron_capture_cm3_s = 2.0e-9
hole_capture_cm3_s = 5.0e-9
[light]""")
    m = _model(text)
    assert m.n_species == 5 and m.n_channels == 19
    arr = kernels.kernel_arrays(m)
    x0 = m.nearest_neutral_state([3.0, 20.0, 1.0, 2.0, 1.0])
    kw = {"x0": x0, "settle_s": 1e-8, "excess": [2, 2, 0, 0, 0], "duration_s": 5e-6,
          "n_samples": 16, "oversample": 2}
    r = kernels.simulate(*arr, rng_state=rng.stream_state(6, 0), **kw)
    assert r.n_events > 2000 and np.count_nonzero(r.events) >= 8
    _same(r, oracle.simulate(*arr, rng_state=rng.stream_state(6, 0), **kw))


def test_compiled_entry_equals_wrapper(small):
    """run (the one compiled entry: records built once, the caller's arrays, no checks) and
    simulate (validating wrapper) run the same loop: identical outputs for one seed, with
    and without the options record switched on."""
    m, arr, x0 = small
    tables = kernels.build_tables(*arr)
    kw = {"x0": x0, "settle_s": 1e-8, "excess": [1, 1, 0], "duration_s": 1e-6,
          "n_samples": 8, "oversample": 3}
    for fw in (None, m.stoich[:, 0]):
        out = kernels.allocate_outputs(m.n_species, m.n_channels, 8, 3, flows=fw is not None)
        st = rng.stream_state(8, 0)
        n = kernels.run(tables, kernels.make_options(None, fw),
                        kernels.allocate_work(tables, m.n_species), out, x0,
                        np.array([1, 1, 0]), st, 1e-8, 1e-6, np.int64(8), np.int64(3))
        r = kernels.simulate(*arr, rng_state=rng.stream_state(8, 0), flow_weight=fw, **kw)
        _same(kernels.TrajectoryResult(*out[:6], n, st.copy(), out.flows), r)


def test_options_record_has_none_values_and_one_compiled_loop(small):
    """The options record: without options its "none" values (no channel has index
    NO_CHANNEL, no flow weights); with and without options the records have the same numba
    types, so the one compiled entry has exactly one specialization (a second one would
    mean a second compilation of the whole loop)."""
    from grmc.engine import tables

    m, arr, x0 = small
    none = kernels.make_options(None, None)
    assert none.mod_channel == tables.NO_CHANNEL and none.mod_channel >= m.n_channels
    assert none.flow_weight.shape == (0,)
    kw = {"x0": x0, "duration_s": 1e-7, "n_samples": 4}
    kernels.simulate(*arr, rng_state=rng.stream_state(1, 0), **kw)
    kernels.simulate(*arr, rng_state=rng.stream_state(1, 0), flow_weight=m.stoich[:, 0],
                     modulation=(2, kernels.SQUARE, 1.0e6, 0.5, 0.0), **kw)
    assert len(kernels.run.signatures) == 1


def test_kernel_equals_oracle_through_rounding_guard_region():
    """Same identity on a model whose propensities span 20 orders of magnitude (dark thermal
    generation next to trap channels), where the running sum and a0 round differently."""
    text = SMALL_TOML.replace("generation_cm3_s = 1.0e24", "generation_cm3_s = 0.0")
    m = _model(text)
    arr = kernels.kernel_arrays(m)
    x0 = m.nearest_neutral_state([0.0, 22.0, 0.0])
    kw = {"x0": x0, "duration_s": 1.0e-6, "n_samples": 16, "oversample": 2}
    _same(kernels.simulate(*arr, rng_state=rng.stream_state(9, 1), **kw),
          oracle.simulate(*arr, rng_state=rng.stream_state(9, 1), **kw))


# ------------------------------------------------------------------------------ recording
def _generation_only(g: float):
    """Hand-built model: one channel of constant rate g [1/s] creating a pair."""
    return (np.array([[1, 1]]), np.array([g]), np.full((1, 3), -1), np.zeros((1, 3)),
            np.ones((1, 3)), np.array([0, 0]), np.array([], dtype=np.int64))


@pytest.mark.parametrize("events_per_bin", [0.05, 40.0])
def test_recording_against_an_independent_reconstruction(events_per_bin):
    """Samples, bin averages and integrals of a pure-generation path, recomputed here from
    the event times alone (right-continuous sampling, exact piecewise-constant integrals;
    definitions of the kernel contract).  The event times follow from the stream: with one
    channel of rate g, event i is at t_i = t_{i-1} + (-log(1 - u) / g) with u the first of
    the two uniforms each event draws (Gillespie 1976, direct method)."""
    n_samples, oversample, duration = 50, 3, 1.0e-3
    n_bins = n_samples * oversample
    g = events_per_bin * n_bins / duration
    x0 = np.array([4, 9])
    st = rng.stream_state(11, 0)
    py = rng.py_state(st)
    res = kernels.simulate(*_generation_only(g), x0=x0, rng_state=st, duration_s=duration,
                           n_samples=n_samples, oversample=oversample)
    times, t = [], 0.0
    while True:
        t = t + (-math.log(1.0 - rng.py_next_double(py)) / g)
        if t > duration:
            break
        rng.py_next_double(py)
        times.append(t)
    times = np.array(times)
    assert res.n_events == len(times) and np.array_equal(st, np.array(py, dtype=np.uint64))
    t_k = duration * (np.arange(n_samples) / n_samples)
    count = np.searchsorted(times, t_k, side="right")  # events at times <= t_k
    assert np.array_equal(res.samples, x0 + count[:, None])
    edges = duration * (np.arange(n_bins + 1) / n_bins)
    # integral of N(t) = #events <= t over [e_j, e_j+1]
    #   = sum over events of (e_j+1 - max(t_i, e_j))+
    over = np.clip(edges[1:, None] - np.maximum(times[None, :], edges[:-1, None]), 0.0, None)
    width = np.diff(edges)
    avg = over.sum(axis=1) / width
    np.testing.assert_allclose(res.bins, x0 + avg[:, None], rtol=1e-12, atol=1e-9)
    n_t = np.concatenate([[0.0], times, [duration]])
    levels = np.arange(len(times) + 1.0)
    dt = np.diff(n_t)
    for s in range(2):
        np.testing.assert_allclose(res.integ[s], np.sum((x0[s] + levels) * dt), rtol=1e-12)
        np.testing.assert_allclose(res.integ2[s], np.sum((x0[s] + levels) ** 2 * dt), rtol=1e-12)
    # bins times their widths add up to the integral (contract); the squares cannot
    np.testing.assert_allclose(res.bins.T @ width, res.integ, rtol=1e-12)
    assert np.array_equal(res.final, x0 + len(times))


def test_bins_agree_with_samples_and_integrals(small):
    """Contract: sum(bins) * width = integral (to rounding); the mean of the bin averages and
    the mean of the point samples estimate the same time average (difference within Z
    standard errors over independent replicates)."""
    _, arr, x0 = small
    n_samples, oversample, duration = 64, 4, 4.0e-6
    diffs = []
    for i in range(12):
        r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(21, i), settle_s=1e-8,
                             duration_s=duration, n_samples=n_samples, oversample=oversample)
        width = duration / (n_samples * oversample)
        np.testing.assert_allclose(r.bins.sum(axis=0) * width, r.integ, rtol=1e-9)
        np.testing.assert_allclose(r.bins.mean(axis=0), r.integ / duration, rtol=1e-9)
        diffs.append(r.samples.mean(axis=0) - r.bins.mean(axis=0))
    d = np.array(diffs)
    se = d.std(axis=0, ddof=1) / math.sqrt(len(d))
    assert np.all(np.abs(d.mean(axis=0)) <= Z * se + 1e-12)


# ------------------------------------------------------------------------------ invariants
def test_charge_conservation_and_trap_bounds(small):
    """docs/physics-notes.md: every event keeps N_e - N_h + M = D - A (acceptor-like level) at every
    sample, in every bin average and at the end; 0 <= M <= T."""
    m, arr, x0 = small
    excess = np.array([4, 4, 0])
    r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(3, 0), settle_s=2e-8,
                         excess=excess, duration_s=3e-6, n_samples=512, oversample=2)
    w = np.asarray(m.charge_weights)
    assert np.all(r.samples @ w == m.charge) and r.final @ w == m.charge
    np.testing.assert_allclose(r.bins @ w, m.charge, atol=1e-9)
    T = m.counts.traps[0]
    assert r.samples[:, 2].min() >= 0 and r.samples[:, 2].max() <= T
    assert np.all(r.samples >= 0) and r.bins[:, 2].max() <= T
    assert len(np.unique(r.samples[:, 2])) > 1  # the trap did change


def test_events_account_for_the_net_change(small):
    """Conservation of events: stoich^T @ events = final - state at t = 0 (sample 0)."""
    m, arr, x0 = small
    r = kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(4, 2), settle_s=1e-8,
                         excess=np.array([2, 2, 0]), duration_s=2e-6, n_samples=16)
    assert r.n_events == r.events.sum() > 1000
    assert np.array_equal(m.stoich.T @ r.events, r.final - r.samples[0])


def _capture_only():
    """Hand-built model: electron capture into T = 10 traps only, a = k N_e (T - M)."""
    return (np.array([[-1, 0, 1]]), np.array([1.0e6]), np.array([[0, 2, -1]]),
            np.array([[1.0, -1.0, 0.0]]), np.array([[0.0, 10.0, 1.0]]), np.array([0, 1]),
            np.array([0]))


def test_absorbing_state():
    """A state with a0 = 0 holds to the end (direct method: no further event); starting in
    it draws nothing from the stream.  Checked against the oracle and by hand."""
    arr = _capture_only()
    kw = {"duration_s": 1.0e-3, "n_samples": 20, "oversample": 2}
    st = rng.stream_state(1, 0)
    r = kernels.simulate(*arr, x0=[3, 0, 0], rng_state=st, **kw)
    assert r.n_events == 3 and np.array_equal(r.final, [0, 0, 3])
    assert np.array_equal(r.samples[-1], [0, 0, 3]) and np.array_equal(r.events, [3])
    # three events = six draws; nothing after absorption
    py = rng.py_state(rng.stream_state(1, 0))
    for _ in range(6):
        rng.py_next_u64(py)
    assert rng.py_state(st) == py
    _same(r, oracle.simulate(*arr, x0=[3, 0, 0], rng_state=rng.stream_state(1, 0), **kw))
    st = rng.stream_state(1, 0)
    r0 = kernels.simulate(*arr, x0=[0, 5, 2], rng_state=st, **kw)
    assert r0.n_events == 0 and np.array_equal(st, rng.stream_state(1, 0))
    assert np.all(r0.samples == [0, 5, 2]) and np.allclose(r0.bins, [0, 5, 2], rtol=1e-14)
    np.testing.assert_allclose(r0.integ, [0.0, 5e-3, 2e-3], rtol=1e-12)
    np.testing.assert_allclose(r0.integ2, [0.0, 25e-3, 4e-3], rtol=1e-12)


def test_invalid_inputs_are_refused(small):
    """Refuse untrustworthy numbers: a dependency list missing a
    channel, an out-of-range state or a bad stream state raise instead of running."""
    _, arr, x0 = small
    kw = {"x0": x0, "duration_s": 1e-7, "n_samples": 4}
    bad_dep = list(arr)
    bad_dep[5] = np.zeros_like(arr[5])
    bad_dep[6] = np.zeros(0, dtype=np.int64)
    with pytest.raises(ValueError, match="dependency"):
        kernels.simulate(*bad_dep, rng_state=rng.stream_state(1, 0), **kw)
    with pytest.raises(ValueError, match="negative"):
        kernels.simulate(*arr, rng_state=rng.stream_state(1, 0),
                         **{**kw, "x0": np.array([1, 1, 6])})  # M > T
    with pytest.raises(TypeError):
        kernels.simulate(*arr, rng_state=np.zeros(4), **kw)
    with pytest.raises(ValueError, match="zero"):
        kernels.simulate(*arr, rng_state=np.zeros(4, dtype=np.uint64), **kw)


# ------------------------------------------------------------------------------ exactness
def _replicates(arr, x0, seed, n, **kw):
    out = [kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(seed, i), **kw)
           for i in range(n)]
    dur = kw["duration_s"]
    return (np.array([r.integ / dur for r in out]), np.array([r.integ2 / dur for r in out]))


def _check(est: np.ndarray, ref: float) -> None:
    se = est.std(ddof=1) / math.sqrt(len(est))
    assert abs(est.mean() - ref) < Z * se, (est.mean(), ref, se)


def test_birth_death_stationary_law():
    """Linear birth-death process (docs/physics-notes.md): electrons in a heavily p-type box (A = 1e5)
    with radiative recombination and optical generation only.  Birth g = (G + B n_i^2) V,
    death k N_e (N_e + A) with k = B / V; detailed balance gives the exact law
    P(n) ~ lambda^n / (n! (n + A)!), lambda = g / k (Darvey, Ninham & Staff, J. Chem. Phys.
    45, 2145, 1966), which is Poisson with mean lambda / A to within ~<n>/A = 5e-5 (van
    Kampen, Stochastic Processes in Physics and Chemistry, ch. VI).  Time-weighted mean and
    variance (the latter about the exact mean, from integ2) within Z standard errors;
    16 replicates of ~4000 relaxation times each, seed 31.  The replicates are the batches of
    a batch-means estimate (independent by construction, so no batch length enters): standard
    error = spread of the 16 per-trajectory values / 4."""
    text = """
title = "birth-death"
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
    m = _model(text)
    A = m.counts.acceptors
    g = (5.0e25 + 1.0e-10 * 1.0e12) * 1.0e-15
    k = 1.0e-10 / 1.0e-15
    n = np.arange(400)
    logw = n * math.log(g / k) - special.gammaln(n + 1) - special.gammaln(n + A + 1)
    p = np.exp(logw - logw.max())
    p /= p.sum()
    mean = float(n @ p)
    var = float((n - mean) ** 2 @ p)
    assert abs(mean - 5.0) < 0.01 and abs(var / mean - 1.0) < 1e-3  # Poisson, mean ~ 5
    arr = kernels.kernel_arrays(m)
    x0 = m.nearest_neutral_state([mean, A + mean])
    m1, m2 = _replicates(arr, x0, 31, 16, settle_s=2e-9, duration_s=4e-7, n_samples=16)
    _check(m1[:, 0], mean)
    _check(m2[:, 0] - 2 * mean * m1[:, 0] + mean**2, var)


def test_pair_reaction_exact_law():
    """Reversible pair reaction at small lambda (Darvey, Ninham & Staff, J. Chem. Phys. 45,
    2145, 1966): intrinsic box with band-to-band processes only, n_i V = 2 (lambda = 4),
    one donor (d = N_e - N_h = 1).  <N_h> = sqrt(lambda) I_{d+1}(z) / I_d(z), z = 2 sqrt(
    lambda), var = lambda - d <N_h> - <N_h>^2: 1.316 and 0.952 (the continuum answer
    (-d + sqrt(d^2 + 4 lambda)) / 2 = 1.562 would fail).  16 replicates, seed 41, Z standard
    errors."""
    text = """
title = "pair"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 2.0e15
radiative_cm3_s = 1.0e-10
donors_cm3 = 1.0e15
[volume]
volume_cm3 = 1.0e-15
"""
    m = _model(text)
    lam, d = 4.0, 1
    z = 2.0 * math.sqrt(lam)
    mean_h = math.sqrt(lam) * special.ive(d + 1, z) / special.ive(d, z)
    var_h = lam - d * mean_h - mean_h**2
    arr = kernels.kernel_arrays(m)
    x0 = m.nearest_neutral_state([2.5, 1.5])
    m1, m2 = _replicates(arr, x0, 41, 16, settle_s=2e-5, duration_s=1e-2, n_samples=16)
    _check(m1[:, 1], mean_h)
    _check(m1[:, 0], mean_h + d)
    _check(m2[:, 1] - 2 * mean_h * m1[:, 1] + mean_h**2, var_h)


def test_dark_trap_equilibrium_law():
    """Detailed balance in the dark (docs/physics-notes.md): the stationary law of (N_e, N_h, M) is
    lambda^N_e / N_e! * lambda^N_h / N_h! * C(T, M) r^M on the neutral states, lambda = n_i V,
    r = n_i / n_1 = exp(-E_t / kT) (each forward/reverse pair -- radiative/thermal, Auger/
    impact, capture/emission -- balances with these weights; e.g. Shockley & Read, Phys. Rev.
    87, 835, 1952 for the trap).  Exact means by enumeration against time-weighted means,
    16 replicates, seed 51, Z standard errors."""
    text = """
title = "dark trap"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 2.0e15
radiative_cm3_s = 1.0e-10
auger_electron_cm6_s = 1.0e-27
auger_hole_cm6_s = 2.0e-27
[volume]
volume_cm3 = 1.0e-15
[[traps]]
label = "t"
count = 4
energy_eV = 0.02
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 3.0e-9
"""
    m = _model(text)
    assert m.n_channels == 10
    lam = 2.0
    r = math.exp(-0.02 / (grmc.model.BOLTZMANN_EV_K * 300.0))
    T = 4
    states, w = [], []
    for M in range(T + 1):
        for nh in range(80):
            ne = nh - M + m.charge
            if ne < 0:
                continue
            states.append((ne, nh, M))
            w.append(ne * math.log(lam) - math.lgamma(ne + 1) + nh * math.log(lam)
                     - math.lgamma(nh + 1) + math.log(math.comb(T, M)) + M * math.log(r))
    w = np.exp(np.array(w) - max(w))
    ref = (np.array(states).T @ w) / w.sum()
    arr = kernels.kernel_arrays(m)
    x0 = m.nearest_neutral_state(ref)
    m1, _ = _replicates(arr, x0, 51, 16, settle_s=1e-6, duration_s=2e-4, n_samples=16)
    for s in range(3):
        _check(m1[:, s], ref[s])


# ------------------------------------------------------------------------------ caching
def test_select_cache_dir_falls_through_and_can_give_up():
    """_jit's choice: the first writable candidate; None (caching off) when none is."""
    cands = [("a", "/x/a", False), ("b", None, False), ("c", "/x/c", True)]
    assert _jit.select_cache_dir(cands, lambda p, private: p == "/x/c") == ("c", "/x/c")
    assert _jit.select_cache_dir(cands, lambda p, private: False) is None
    assert _jit.is_writable_dir("/proc/grmc-cannot-exist") is False


_CACHE_SCRIPT = """
import sys, tempfile, time
{pre}
import numpy as np
from grmc.engine import _jit
from grmc.engine import kernels, rng
arr = (np.array([[1, 1]]), np.array([1.0e3]), np.full((1, 3), -1), np.zeros((1, 3)),
       np.ones((1, 3)), np.array([0, 0]), np.array([], dtype=np.int64))
r = kernels.simulate(*arr, x0=[0, 0], rng_state=rng.stream_state(1, 0), duration_s=1.0,
                     n_samples=4)
assert r.n_events > 500
print(_jit.CACHE_ENABLED, _jit.CACHE_DIR, sum(kernels.run._cache_hits.values()))
"""


def test_kernels_run_and_cache_from_an_unwritable_install(tmp_path):
    """The package installed read-only: NUMBA_CACHE_DIR and HOME unwritable (under /proc, so
    even root cannot write) and the in-tree __pycache__ unusable (a file in its place).  The
    engine caches under the temporary directory instead, and a second process loads the
    cache; with no writable place at all it still runs, uncached."""
    pkg = tmp_path / "site"
    shutil.copytree(ROOT / "grmc", pkg / "grmc",
                    ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    (pkg / "grmc" / "engine" / "__pycache__").write_text("not a directory")
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    env = {k: v for k, v in os.environ.items()
           if k not in ("NUMBA_CACHE_DIR", "XDG_CACHE_HOME", "PYTHONPATH")}
    env.update(NUMBA_CACHE_DIR="/proc/grmc-no-cache", HOME="/proc/grmc-no-home",
               TMPDIR=str(tmp), PYTHONPATH=str(pkg), PYTHONDONTWRITEBYTECODE="1")

    def run(pre=""):
        out = subprocess.run([sys.executable, "-c", _CACHE_SCRIPT.format(pre=pre)], env=env,
                             cwd=tmp_path, capture_output=True, text=True, timeout=300,
                             check=False)
        assert out.returncode == 0, out.stderr
        return out.stdout.split()

    first = run()
    assert first[0] == "True" and first[1] == str(tmp / f"grmc-numba-{os.getuid()}")
    assert any(Path(first[1]).rglob("*.nbi"))  # numba's cache index was written there
    second = run()
    assert first[2] == "0" and second[1] == first[1] and second[2] == "1"  # cache loaded
    none = run(pre="tempfile.tempdir = '/proc/grmc-no-tmp'")
    assert none[0] == "False" and none[1] == "None"
