"""Tests of grmc.spectra: periodogram, intervals, Lorentzian analysis, current noise.

The reference process is an exact random telegraph signal (two-state Markov process with
exponential dwell times), generated here in plain numpy and reduced to EXACT fine-bin
averages by integrating the piecewise-constant signal; its spectrum is Machlup's closed
form (J. Appl. Phys. 25, 341, 1954).  Time is measured in output sample intervals (fs = 1).

Statistical tolerances: every averaged periodogram value is S chi^2_{2K}/(2K) (Welch,
IEEE Trans. Audio Electroacoust. 15, 70, 1967), so a ratio estimate/true has mean 1 and
standard deviation 1/sqrt(K), which sets the per-frequency intervals.  A MEAN over many
frequencies is different for a telegraph signal: it is not Gaussian, and its fourth cumulant
correlates the periodogram values at different frequencies, so 1/sqrt(n K) is not its
standard error (it was wrong by a factor up to 2 either way in trials).  Band means are
therefore checked against the spread between independent trajectories, with Student's t.
Every check uses a fixed seed and a critical value for which it fails by chance with
probability <= 1e-3 (Bonferroni over the bands where there are several).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from grmc import spectra as sp

OVERSAMPLE = 8
DT_FINE = 1.0 / OVERSAMPLE  # output sample interval = 1, fs = 1


def telegraph_path(
    rng: np.random.Generator, total: float, tau_1: float, tau_0: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact 0/1 telegraph signal on [0, total], stationary start.

    Dwell times are exponential with means tau_1 (state 1) and tau_0 (state 0); the first
    state is drawn from the stationary law P(1) = tau_1 / (tau_1 + tau_0) and, by the
    memoryless property, the first dwell is an ordinary one.  Returns the switching times
    (times[0] = 0), the state on [times[i], times[i+1]) and the integral of the signal from
    0 to times[i].
    """
    state0 = int(rng.random() < tau_1 / (tau_1 + tau_0))
    per_pair = 2.0 * total / (tau_1 + tau_0)
    n = int(per_pair + 10.0 * math.sqrt(per_pair) + 20)
    while True:
        states = (state0 + np.arange(n)) % 2
        dwell = rng.exponential(1.0, n) * np.where(states == 1, tau_1, tau_0)
        times = np.concatenate([[0.0], np.cumsum(dwell)])
        if times[-1] > total:
            break
        n *= 2
    cum = np.concatenate([[0.0], np.cumsum(states * dwell)])
    return times, states, cum


def telegraph_bins(
    rng: np.random.Generator, n_bins: int, dt: float, tau_1: float, tau_0: float
) -> np.ndarray:
    """Exact averages of a telegraph signal over bins of width dt: F(t) = int_0^t x is exact
    at every bin edge (integral to the last switch plus the state times the time since it),
    and a bin average is the difference of F over dt."""
    times, states, cum = telegraph_path(rng, n_bins * dt, tau_1, tau_0)
    edges = np.arange(n_bins + 1) * dt
    i = np.searchsorted(times, edges, side="right") - 1
    integral = cum[i] + states[i] * (edges - times[i])
    return np.diff(integral) / dt


def tau_pair_for_corner(f_c: float, ratio: float = 1.0) -> tuple[float, float]:
    """Dwell times (tau_1, tau_0 = ratio * tau_1) whose telegraph corner is f_c."""
    rate = 2.0 * math.pi * f_c  # 1/tau_1 + 1/tau_0
    tau_1 = (1.0 + 1.0 / ratio) / rate
    return tau_1, ratio * tau_1


def ensemble_psd(
    seed: int, trajectories: int, samples: int, segments: int, tau_1: float, tau_0: float
) -> tuple[np.ndarray, np.ndarray, int]:
    """Per-trajectory periodograms (trajectories, n_freq) and K = trajectories * segments;
    their mean over trajectories is what the ensemble code stores."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(trajectories):
        x = telegraph_bins(rng, samples * OVERSAMPLE, DT_FINE, tau_1, tau_0)
        f, p = sp.periodogram(x, DT_FINE, oversample=OVERSAMPLE, segments=segments)
        out.append(p)
    return f, np.array(out), trajectories * segments


def band_mean(ratio_per_trajectory: np.ndarray, sel: np.ndarray) -> tuple[float, float]:
    """Mean over a band of estimate/true and its standard error from the spread between
    independent trajectories.

    Why not 1/sqrt(n K): a telegraph signal is not Gaussian, and its fourth cumulant
    correlates periodogram values at different frequencies (the level above the corner is
    set by the number of switches in the segment), so a mean over many frequencies scatters
    more (or less) than independent chi^2 values would.  The trajectory-to-trajectory
    spread honours that; the check then uses Student's t with trajectories - 1 dof.
    """
    m = ratio_per_trajectory[:, sel].mean(axis=1)
    return float(m.mean()), float(m.std(ddof=1) / math.sqrt(m.size))


def t_crit(n_traj: int, n_checks: int = 1, alpha: float = 1e-3) -> float:
    """Two-sided Student t quantile, Bonferroni over n_checks, overall false-alarm alpha."""
    return float(stats.t.isf(alpha / (2 * n_checks), n_traj - 1))


# --------------------------------------------------------------------------------------------
def test_welch_interval_k16():
    # docs/physics-notes.md and Welch (1967): K = 16 -> [0.647, 1.750] S_hat
    low, high = sp.welch_interval(1.0, 16)
    assert low == pytest.approx(0.647, abs=5e-4)
    assert high == pytest.approx(1.750, abs=5e-4)
    # broadcasting over frequencies, and K read back from the interval
    s = np.array([1.0, 2.0, 4.0])
    lo, hi = sp.welch_interval(s, 16)
    np.testing.assert_allclose(lo / s, 0.6467, atol=5e-4)
    assert sp.segments_from_interval(s, lo, hi) == pytest.approx(16, rel=1e-6)


def test_frequency_grid_and_shapes():
    # definition: f_j = j / T_seg up to the output Nyquist frequency samples / (2 duration)
    samples, segments, duration = 256, 4, 2.0e-6
    x = np.random.default_rng(0).normal(size=(samples * OVERSAMPLE, 3))
    dt = duration / (samples * OVERSAMPLE)
    f, p = sp.periodogram(x, dt, oversample=OVERSAMPLE, segments=segments)
    t_seg = duration / segments
    np.testing.assert_allclose(f, np.arange(1, samples // segments // 2 + 1) / t_seg)
    assert f[-1] == pytest.approx(samples / (2 * duration))
    assert p.shape == (3, f.size)
    np.testing.assert_allclose(
        f, sp.periodogram_frequencies(samples, duration, segments=segments, oversample=8)
    )
    _f1, p1 = sp.periodogram(x[:, 1], dt, oversample=OVERSAMPLE, segments=segments)
    np.testing.assert_allclose(p1, p[1], rtol=1e-12)
    # with oversample = 1 the fine Nyquist bin (1 degree of freedom) is left out
    f2, _ = sp.periodogram(x[:256, 0], 1.0, oversample=1)
    assert f2[-1] < 0.5 and f2.size == 127
    with pytest.raises(ValueError, match="multiple of oversample"):
        sp.periodogram(x[:-1], dt, oversample=OVERSAMPLE)


def test_machlup_telegraph_within_intervals():
    # Machlup (1954) closed form vs the estimate with K = 16 segments (16 trajectories),
    # over two decades fs/400 .. fs/4 around an asymmetric telegraph's corner at fs/40.
    # Rectangular-window leakage tau/T_seg = 6.4/4096 = 0.16 % and aliasing (< 1e-4 here)
    # are far below the per-bin error 1/sqrt(16) = 25 %.
    tau_1, tau_0 = tau_pair_for_corner(1.0 / 40.0, ratio=2.5)
    f, per_traj, k = ensemble_psd(11, trajectories=16, samples=4096, segments=1,
                                  tau_1=tau_1, tau_0=tau_0)
    assert k == 16
    psd = per_traj.mean(axis=0)
    low, high = sp.welch_interval(psd, k)
    true = sp.telegraph_psd(f, tau_1, tau_0)
    band = (f >= 1.0 / 400) & (f <= 1.0 / 4)
    n = int(band.sum())
    outside = int(np.sum((true[band] < low[band]) | (true[band] > high[band])))
    # 95 % intervals: the count outside is Binomial(n, 0.05) for independent bins
    lo_count = stats.binom.ppf(5e-4, n, 0.05)
    hi_count = stats.binom.isf(5e-4, n, 0.05)
    assert lo_count <= outside <= hi_count, (outside, n)
    # band means of estimate/true (2 bands per decade), standard errors from the spread
    # between trajectories (see band_mean)
    ratio = per_traj / true
    edges = np.logspace(math.log10(1 / 400), math.log10(1 / 4), 5)
    t = t_crit(per_traj.shape[0], len(edges) - 1)
    for lo_f, hi_f in itertools.pairwise(edges):
        mean, se = band_mean(ratio, (f >= lo_f) & (f < hi_f))
        assert abs(mean - 1.0) < t * se, (lo_f, hi_f, mean, se)


def alias_expectation(f: np.ndarray, spectrum, oversample: int = OVERSAMPLE) -> np.ndarray:
    """Eq. (1) of periodogram's Notes divided by sinc^2(f/fs_fine): what the estimate
    tends to, for fs = 1."""
    fs_fine = float(oversample)
    k = np.arange(-4000, 4001)
    ff = f[:, None] + k[None, :] * fs_fine
    s_d = np.sum(spectrum(ff) * np.sinc(ff / fs_fine) ** 2, axis=1)
    return s_d / np.sinc(f / fs_fine) ** 2


def test_unbiased_near_sampling_limit():
    # A telegraph signal with its corner at 10 fs is white far past the Nyquist frequency
    # fs/2 (Machlup 1954).  The mean ratio estimate/true over fs/10 .. fs/2 must be 1 within
    # its standard error (trajectory spread, t with 31 dof; 1/sqrt(n K) = 0.44 % for
    # independent chi^2 values).
    f_c = 10.0
    tau_1, tau_0 = tau_pair_for_corner(f_c)
    samples, segments, trajectories = 4096, 4, 32
    f, per_traj, _k = ensemble_psd(5, trajectories, samples, segments, tau_1, tau_0)
    true = sp.telegraph_psd(f, tau_1, tau_0)
    band = (f >= 0.1) & (f <= 0.5)
    mean, se = band_mean(per_traj / true, band)
    # What remains after the sinc correction is aliasing from the fine rate, eq. (1):
    # +0.23 % averaged over the band, below the standard error, so the test can see 1.
    expected = alias_expectation(f[band], lambda x: sp.telegraph_psd(x, tau_1, tau_0))
    residual = float(np.mean(expected / true[band]) - 1.0)
    assert 0 < residual < se
    assert abs(mean - 1.0) < t_crit(trajectories) * se, (mean, se)

    # Documenting assert: instantaneous samples x(t_k) at fs (no bin averaging) alias the
    # whole white spectrum into the band: sum_k S(f + k fs) ~ pi f_c / fs ~ 31 times S(f).
    rng = np.random.default_rng(6)
    naive = []
    for _ in range(4):
        times, states, _ = telegraph_path(rng, float(samples), tau_1, tau_0)
        x = states[np.searchsorted(times, np.arange(samples), side="right") - 1].astype(float)
        seg = x.reshape(segments, -1)
        seg = seg - seg.mean(axis=1, keepdims=True)
        p = 2.0 / seg.shape[1] * np.mean(np.abs(np.fft.rfft(seg, axis=1)) ** 2, axis=0)
        naive.append(p[1 : f.size + 1])
    assert np.mean(np.mean(naive, axis=0)[band] / true[band]) > 10.0
    # ...and the correction is exactly the inverse of the fine bins' boxcar response
    # |H(f)|^2 = (sin(pi f dt) / (pi f dt))^2 (Fourier transform of a rectangle, common
    # practice): the project's periodogram of one record over scipy.signal.periodogram's
    # (reference library: the plain one-sided density of the same fine bins).
    from scipy import signal

    fine = rng.normal(size=samples * OVERSAMPLE)
    dt = 1.0 / OVERSAMPLE
    f_p, p = sp.periodogram(fine, dt, oversample=OVERSAMPLE, segments=1)
    f_s, p_s = signal.periodogram(fine, fs=1.0 / dt, window="boxcar", detrend="constant")
    np.testing.assert_allclose(f_s[1 : f_p.size + 1], f_p, rtol=1e-12)
    x = math.pi * f_p * dt
    np.testing.assert_allclose(p / p_s[1 : f_p.size + 1], (x / np.sin(x)) ** 2, rtol=1e-9)
    # at fs/2 the plain density is low by 1.3 %, (sin(pi/16) / (pi/16))^2 = 0.98721
    assert (x[-1] / math.sin(x[-1])) ** -2 == pytest.approx(0.98721, abs=2e-5)


def test_slow_lorentzian_within_one_percent():
    # docs/file-format.md contract: within 1 % below fs/5.  Telegraph corner fs/20 << fs
    # (Machlup 1954); T_seg = 16384 samples so leakage tau/T_seg = 0.02 %; aliasing < 1e-5.
    # K = 32 x 4 = 128 segments with ~3277 values each below fs/5: 1/sqrt(n K) = 0.15 %.
    # The standard error actually used is the trajectory spread (see band_mean); the check
    # is meaningful only if t * se < 1 %, which is asserted.
    tau_1, tau_0 = tau_pair_for_corner(1.0 / 20.0)
    f, per_traj, _k = ensemble_psd(21, trajectories=32, samples=4 * 16384, segments=4,
                                  tau_1=tau_1, tau_0=tau_0)
    ratio = per_traj / sp.telegraph_psd(f, tau_1, tau_0)
    mean, se = band_mean(ratio, f <= 0.2)
    t = t_crit(per_traj.shape[0])
    assert t * se < 0.01
    assert abs(mean - 1.0) < t * se, (mean, se)
    # and per band (2 per decade), each within its own standard error
    edges = np.logspace(math.log10(f[0]), math.log10(0.2), 8)
    tb = t_crit(per_traj.shape[0], len(edges) - 1)
    for lo_f, hi_f in itertools.pairwise(edges):
        mean_b, se_b = band_mean(ratio, (f >= lo_f) & (f <= hi_f))
        assert abs(mean_b - 1.0) < tb * se_b, (lo_f, hi_f, mean_b, se_b)


def test_rectangular_window_leakage_formula():
    # Eq. (3) of periodogram's Notes (Wiener-Khinchin with the triangular lag window,
    # derived there): with tau = T_seg / 20 the estimate is low below the corner and high by
    # ~5 % above it; rectangular_window_factor predicts both.
    t_seg = 256
    tau_c = t_seg / 20.0
    f_c = 1.0 / (2 * math.pi * tau_c)
    tau_1, tau_0 = tau_pair_for_corner(f_c)
    f, per_traj, _k = ensemble_psd(3, trajectories=40, samples=256 * 50, segments=50,
                                  tau_1=tau_1, tau_0=tau_0)
    ratio = per_traj / sp.telegraph_psd(f, tau_1, tau_0)
    window = sp.rectangular_window_factor(f, f_c, t_seg)
    t = t_crit(per_traj.shape[0], 3)
    for sel in (f < f_c, f > 3 * f_c):
        mean, se = band_mean(ratio / window, sel)
        assert abs(mean - 1.0) < t * se, (mean, se)
    # documenting: the bias itself is real, many standard errors away from 1
    mean, se = band_mean(ratio, f > 3 * f_c)
    assert mean - 1.0 > t * se
    assert mean == pytest.approx(1 + tau_c / t_seg, abs=t * se)


def test_parseval():
    # Parseval (docs/physics-notes.md): sum(P) df over the reported band equals the variance of the
    # fine-bin averages minus their power above fs/2.  For a telegraph corner at fs/20 the
    # expected discrepancy is about -5 % (Machlup's spectrum above fs/2, as seen through
    # the bin average).  Computed here exactly: numerator sum_j S(f_j) W(f_j) df (eq. (3)
    # for window and segment mean), denominator E[mean square about the segment mean] =
    # var_avg(dt_fine) - var_avg(T_seg), where var_avg(D) = 2 var (tau/D)^2 (D/tau - 1 +
    # exp(-D/tau)) is the variance of a D-average of an exponentially correlated process
    # (standard result, from memory).  Standard error from 16 independent trajectories.
    f_c = 1.0 / 20.0
    tau_1, tau_0 = tau_pair_for_corner(f_c)
    tau = 1.0 / (2 * math.pi * f_c)
    var = tau_1 * tau_0 / (tau_1 + tau_0) ** 2
    samples, segments, trajectories = 4 * 4096, 4, 16
    rng = np.random.default_rng(9)
    measured = []
    for _ in range(trajectories):
        x = telegraph_bins(rng, samples * OVERSAMPLE, DT_FINE, tau_1, tau_0)
        f, psd = sp.periodogram(x, DT_FINE, oversample=OVERSAMPLE, segments=segments)
        measured.append(np.sum(psd) * f[0] / np.mean(x.reshape(segments, -1).var(axis=1)))
    t_seg = 1.0 / f[0]

    def var_avg(d: float) -> float:
        return 2 * var * (tau / d) ** 2 * (d / tau - 1 + math.exp(-d / tau))

    inband = np.sum(sp.telegraph_psd(f, tau_1, tau_0)
                    * sp.rectangular_window_factor(f, f_c, t_seg)) * f[0]
    expected = inband / (var_avg(DT_FINE) - var_avg(t_seg))
    assert 0.93 < expected < 0.97
    mean = float(np.mean(measured))
    se = float(np.std(measured, ddof=1) / math.sqrt(trajectories))
    assert abs(mean - expected) < t_crit(trajectories) * se, (mean, expected, se)
    # the normalisation is what is tested: a factor-2 slip would miss by ~ 1000 se
    assert se < 0.005


def test_fit_recovers_telegraph_parameters():
    # Machlup (1954): S0 = 4 var tau, f_c = (1/tau_1 + 1/tau_0) / (2 pi).  One record must
    # fall within 3 of its own standard errors; over 16 independent records the S0 pulls
    # have a sum of squares ~ chi^2_16 (calibration of the reported error).  (The f_c error
    # of a single telegraph is underestimated by ~25 %, see LorentzianFit; it is checked by
    # the 3-sigma rule only.)
    f_c = 1.0 / 30.0
    tau_1, tau_0 = tau_pair_for_corner(f_c, ratio=3.0)
    tau = 1.0 / (2 * math.pi * f_c)
    s0 = 4 * tau_1 * tau_0 / (tau_1 + tau_0) ** 2 * tau
    pulls_fc, pulls_s0 = [], []
    for rep in range(16):
        f, per_traj, k = ensemble_psd(100 + rep, trajectories=4, samples=4 * 2048,
                                      segments=4, tau_1=tau_1, tau_0=tau_0)
        psd = per_traj.mean(axis=0)
        low, high = sp.welch_interval(psd, k)
        res = sp.analyse_spectrum(f, psd, low, high, k)
        assert res.kind == "one", res.message
        (c,) = res.components
        assert c.ok
        pulls_fc.append((c.f_c - f_c) / c.f_c_err)
        pulls_s0.append((c.S0 - s0) / c.S0_err)
        assert c.tau == pytest.approx(1 / (2 * math.pi * c.f_c))
        assert c.variance == pytest.approx(math.pi / 2 * c.S0 * c.f_c)
    ss = float(np.sum(np.square(pulls_s0)))
    assert stats.chi2.ppf(5e-4, 16) < ss < stats.chi2.isf(5e-4, 16), pulls_s0
    assert abs(pulls_fc[0]) < 3 and abs(pulls_s0[0]) < 3
    # the same fit through the low-level function, K read from the interval
    fit = sp.fit_lorentzian(f, psd, low, high, segment_duration=1 / f[0])
    assert fit.f_c == pytest.approx(res.components[0].f_c, rel=1e-6)


def test_jackknife_errors_calibrated():
    # Jackknife over trajectories (Quenouille 1956, Tukey 1958): the spread of f_c over 20
    # independent ensembles must match the mean jackknife variance; the ratio of the
    # empirical variance to it is ~ chi^2_19 / 19 (two-sided 1e-3 bounds).
    f_c = 1.0 / 30.0
    tau_1, tau_0 = tau_pair_for_corner(f_c, ratio=3.0)
    est, jk2 = [], []
    for rep in range(20):
        f, per_traj, k = ensemble_psd(700 + rep, trajectories=16, samples=2048, segments=1,
                                      tau_1=tau_1, tau_0=tau_0)
        res = sp.analyse_spectrum(f, per_traj.mean(axis=0), None, None, k, batches=per_traj)
        assert res.kind == "one" and "jackknife over 16 batches" in res.message
        est.append(res.components[0].f_c)
        jk2.append(res.components[0].f_c_err ** 2)
    ratio = np.var(est, ddof=1) / np.mean(jk2)
    assert stats.chi2.ppf(5e-4, 19) / 19 < ratio < stats.chi2.isf(5e-4, 19) / 19, ratio
    assert abs(np.mean(est) - f_c) < t_crit(20) * np.std(est, ddof=1) / math.sqrt(20)


def test_two_lorentzians_detected():
    # Sum of two independent telegraph signals (Machlup 1954 each; spectra add): corners at
    # fs/400 and fs/15, a factor 27 apart.  One Lorentzian must be rejected and two found,
    # each number within 3.5 standard errors (normal, Bonferroni: 1e-3 over four numbers).
    fa, fb = 1.0 / 400.0, 1.0 / 15.0
    ta1, ta0 = tau_pair_for_corner(fa)
    tb1, tb0 = tau_pair_for_corner(fb)
    rng = np.random.default_rng(31)
    samples, segments, trajectories = 2 * 8192, 2, 8
    total = 0.0
    for _ in range(trajectories):
        x = telegraph_bins(rng, samples * OVERSAMPLE, DT_FINE, ta1, ta0)
        x += telegraph_bins(rng, samples * OVERSAMPLE, DT_FINE, tb1, tb0)
        f, p = sp.periodogram(x, DT_FINE, oversample=OVERSAMPLE, segments=segments)
        total = total + p
    psd, k = total / trajectories, trajectories * segments
    low, high = sp.welch_interval(psd, k)
    res = sp.analyse_spectrum(f, psd, low, high, k)
    assert res.kind == "two", res.message
    slow, fast = res.components
    z = float(stats.norm.isf(1e-3 / 8))
    s0a = 4 * 0.25 / (2 * math.pi * fa)  # 4 var tau, var = 1/4 for a symmetric signal
    s0b = 4 * 0.25 / (2 * math.pi * fb)
    assert abs(slow.f_c - fa) < z * slow.f_c_err
    assert abs(fast.f_c - fb) < z * fast.f_c_err
    assert abs(slow.S0 - s0a) < z * slow.S0_err
    assert abs(fast.S0 - s0b) < z * fast.S0_err
    one = sp.fit_lorentzian(f, psd, n_segments=k, segment_duration=1 / f[0])
    assert one.p_value < sp.P_REJECT and not one.ok


@pytest.mark.parametrize(
    "f_c, words", [(1e-4, "below the lowest resolved frequency"),
                   (5.0, "above the highest resolved frequency")],
)
def test_refuses_corner_outside_band(f_c, words):
    # Synthetic averaged periodogram: Lorentzian times chi^2_{2K}/(2K) (Welch 1967), on the
    # band 1e-2 .. 0.5; a corner far outside it must be refused, not reported.
    rng = np.random.default_rng(4)
    f = np.arange(1, 513) / 1024.0
    k = 16
    psd = 1.0 / (1 + (f / f_c) ** 2) * rng.chisquare(2 * k, f.size) / (2 * k)
    low, high = sp.welch_interval(psd, k)
    res = sp.analyse_spectrum(f, psd, low, high, k, segment_duration=None)
    assert res.kind == "unresolved"
    assert words in res.message
    assert res.components == ()
    assert res.as_dict()["kind"] == "unresolved"


def test_current_from_matrix_and_scale():
    # I = q bias / L^2 (mu_n N_e + mu_p N_h) (common photoconductor theory, from memory)
    readout = {"bias_V": 2.0, "length_cm": 1e-4, "electron_mobility_cm2_Vs": 1400.0,
               "hole_mobility_cm2_Vs": 450.0}
    a_e, a_h = sp.current_scale(readout)
    q = 1.602176634e-19  # CODATA 2018, exact
    assert a_e == pytest.approx(q * 2.0 / 1e-8 * 1400.0, rel=1e-12)
    assert a_h == pytest.approx(q * 2.0 / 1e-8 * 450.0, rel=1e-12)
    # a known Hermitian matrix: a^2 S_ee + 2 a b Re S_eh + b^2 S_hh
    S = np.zeros((3, 3, 2), dtype=complex)
    S[0, 0] = [4.0, 1.0]
    S[1, 1] = [9.0, 2.0]
    S[0, 1] = [1.0 + 2.0j, -0.5j]
    S[1, 0] = np.conj(S[0, 1])
    S[2, 2] = 100.0  # a trap species: carries no current
    np.testing.assert_allclose(sp.current_psd_from_matrix(S, 2.0, 3.0),
                               [4 * 4 + 2 * 6 * 1 + 9 * 9, 4 * 1 + 0 + 9 * 2])
    # linearity: the matrix combination is exactly the periodogram of the current series
    x = np.random.default_rng(2).normal(size=(64 * OVERSAMPLE, 3))
    x[:, 1] += 0.5 * x[:, 0]
    _f, P = sp.cross_periodogram(x, DT_FINE, oversample=OVERSAMPLE, segments=2)
    _, p_i = sp.periodogram(a_e * x[:, 0] + a_h * x[:, 1], DT_FINE, oversample=OVERSAMPLE,
                            segments=2)
    np.testing.assert_allclose(sp.current_psd_from_matrix(P, a_e, a_h), p_i, rtol=1e-10)
    _, p_diag = sp.periodogram(x, DT_FINE, oversample=OVERSAMPLE, segments=2)
    np.testing.assert_allclose(np.einsum("aaj->aj", P).real, p_diag, rtol=1e-12)


def test_closed_forms_agree():
    # docs/physics-notes.md: photoconductor G-R noise 4 q G I / (1 + (2 pi f tau)^2) equals
    # 4 I^2 tau / (N_0 (1 + ...)) when var = N_0, i.e. van Vliet's Lorentzian times the
    # squared current per carrier (van Vliet, Proc. IRE 46, 1004, 1958, from memory).
    q = sp.ELEMENTARY_CHARGE_C
    n0, tau, t_tr = 50.0, 1e-6, 1e-8
    current = q * n0 / t_tr
    f = np.logspace(3, 8, 11)
    np.testing.assert_allclose(
        sp.photoconductor_gr_psd(f, current, tau / t_tr, tau),
        (q / t_tr) ** 2 * sp.lorentzian(f, n0, tau), rtol=1e-12)
    # Machlup's telegraph spectrum is a Lorentzian with 1/tau = 1/tau_1 + 1/tau_0 and
    # variance tau_1 tau_0 / (tau_1 + tau_0)^2 (docs/physics-notes.md)
    t1, t0 = 2e-6, 3e-6
    np.testing.assert_allclose(
        sp.telegraph_psd(f, t1, t0, delta=2.0),
        sp.lorentzian(f, 4.0 * t1 * t0 / (t1 + t0) ** 2, 1 / (1 / t1 + 1 / t0)), rtol=1e-12)
    # Schottky (1918): 2 q I
    assert sp.shot_noise_psd(1e-3) == pytest.approx(2 * q * 1e-3)


def test_choose_segments():
    # rule of the design: >= 16 averaged segments, >= 64 output samples per segment
    assert sp.choose_segments(16, 4096) == 1
    assert sp.choose_segments(300, 16) == 1
    assert sp.choose_segments(1, 4096) == 16
    assert sp.choose_segments(3, 4096) == 6
    assert sp.choose_segments(1, 512) == 8  # 64 samples each: capped
    assert sp.choose_segments(1, 100) == 1


def test_drive_lines_are_left_out_of_the_fit():
    """A periodic drive adds deterministic lines at f_d and its harmonics (a square wave's
    odd harmonics fall as 1/k: Fourier series, common practice).  Left out of the fit, the
    Lorentzian beneath is found again: its corner within 3 standard errors of the true one
    (van Vliet, Proc. IRE 46, 1004, 1958, from memory, for the Lorentzian; the noise is the
    chi-squared law of an average of K periodogram values, Welch 1967, seed fixed)."""
    rng = np.random.default_rng(15)
    t_seg, n_freq, k = 1e-3, 2000, 64
    f = np.arange(1, n_freq + 1) / t_seg
    f_c, s0 = 2.0e5, 1e-6
    true = s0 / (1 + (f / f_c) ** 2)
    psd = true * rng.chisquare(2 * k, f.size) / (2 * k)
    f_d = 1.0e5 + 0.3 / t_seg  # off the Fourier grid: the lines leak into their neighbours
    for harmonic in (1, 3, 5, 7, 9):
        m = np.arange(f.size)
        leak = np.sinc(m - (harmonic * f_d * t_seg - 1)) ** 2  # rectangular window
        psd = psd + 50 * s0 / harmonic**2 * leak
    low, high = sp.welch_interval(psd, k)
    mask = sp.drive_line_mask(f, f_d)
    near = np.abs(f[:, None] - f_d * np.arange(1, 21)[None, :]).min(axis=1)
    np.testing.assert_array_equal(mask, near <= 3.5 / t_seg)
    res = sp.analyse_spectrum(f, psd, low, high, k, drive_Hz=f_d)
    assert res.kind == "one", res.message
    c = res.components[0]
    assert abs(c.f_c - f_c) < 3 * c.f_c_err, (c.f_c, c.f_c_err)
    # with the lines in, no single Lorentzian describes the spectrum
    assert sp.analyse_spectrum(f, psd, low, high, k).kind != "one"
