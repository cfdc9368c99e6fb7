"""Noise spectra: periodogram estimates with intervals, Lorentzian analysis, current noise.

Everything here is per trajectory and cheap (one real FFT per segment), so that the ensemble
code can call it once per trajectory and add the results.  numpy and scipy only.

Conventions used throughout
---------------------------
* Time runs along the FIRST axis of an input record (``bins`` of shape ``(n_fine,)`` or
  ``(n_fine, S)``, as the event engine stores them); frequency runs along the LAST axis of an
  output (``(n_freq,)``, ``(S, n_freq)`` or ``(S, S, n_freq)``), as the output file stores
  ``psd (species, frequency)``.
* Spectra are one-sided power spectral densities: the integral over 0 < f < inf is the
  variance.  Units are [unit^2/Hz], i.e. counts^2/Hz for counts and A^2/Hz for a current.

Public API
----------
periodogram_frequencies(samples, duration_s, *, segments=1, oversample) -> ndarray
periodogram(bins, dt_fine, *, oversample, segments=1) -> (freqs, P)
cross_periodogram(bins, dt_fine, *, oversample, segments=1) -> (freqs, P)
welch_interval(psd_mean, n_segments_total, *, level=0.95, dof_per_segment=2) -> (low, high)
segments_from_interval(psd, low, high, *, level=0.95) -> float
choose_segments(trajectories, samples) -> int
current_scale(readout) -> (a_e, a_h)
current_psd_from_matrix(S_matrix, a_e, a_h) -> ndarray
lorentzian(f, var, tau), telegraph_psd(f, tau_1, tau_0, delta=1.0) (from grmc.exact),
photoconductor_gr_psd(f, current, gain, tau), shot_noise_psd(current)
rectangular_window_factor(f, f_c, segment_duration) -> ndarray
fit_lorentzian(freqs, psd, low, high, ...) -> LorentzianFit
fit_two_lorentzians(freqs, psd, low, high, ...) -> tuple[LorentzianFit, LorentzianFit]
analyse_spectrum(freqs, psd, low, high, n_segments, ...) -> SpectrumAnalysis
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, replace
from typing import Any, Literal

import numpy as np
import scipy.fft
from scipy import optimize, special

from .exact import telegraph_psd
from .model import ELEMENTARY_CHARGE_C

__all__ = [
    "ELEMENTARY_CHARGE_C",
    "LorentzianFit",
    "SpectrumAnalysis",
    "analyse_spectrum",
    "drive_line_mask",
    "choose_segments",
    "cross_periodogram",
    "current_psd_from_matrix",
    "current_scale",
    "fit_lorentzian",
    "fit_two_lorentzians",
    "lorentzian",
    "periodogram",
    "periodogram_frequencies",
    "photoconductor_gr_psd",
    "rectangular_window_factor",
    "segments_from_interval",
    "shot_noise_psd",
    "telegraph_psd",
    "welch_interval",
]

#: p-value below which one Lorentzian is rejected in favour of two.
P_REJECT = 1e-3

#: Fewest usable frequencies per fitted parameter before a fit is attempted.
_MIN_POINTS_PER_PARAMETER = 4


def _chi2():
    """``scipy.stats.chi2``, imported on first use (scipy.stats takes about half a second to
    import, which a run can spend while its trajectories are simulated)."""
    from scipy.stats import chi2

    return chi2


# --------------------------------------------------------------------------------------------
# Periodogram
# --------------------------------------------------------------------------------------------
def _segment_layout(n_fine: int, oversample: int, segments: int) -> tuple[int, int, int]:
    """Validate the record layout; return (samples per segment, fine bins per segment, n_freq)."""
    if oversample < 1 or int(oversample) != oversample:
        raise ValueError(f"oversample must be a positive integer, got {oversample!r}")
    if segments < 1 or int(segments) != segments:
        raise ValueError(f"segments must be a positive integer, got {segments!r}")
    if n_fine % oversample:
        raise ValueError(
            f"the record has {n_fine} fine bins, not a multiple of oversample = {oversample}"
        )
    samples = n_fine // oversample
    n_seg = samples // segments
    # With oversample = 1 the output Nyquist frequency is the fine Nyquist frequency, whose
    # periodogram value is real (one degree of freedom, fully aliased): leave it out.
    n_freq = n_seg // 2 if oversample > 1 else (n_seg - 1) // 2
    if n_freq < 1:
        raise ValueError(
            f"{samples} samples in {segments} segment(s) leave {n_seg} samples per segment: "
            "too few for a spectrum"
        )
    return n_seg, n_seg * oversample, n_freq


def periodogram_frequencies(
    samples: int, duration_s: float, *, segments: int = 1, oversample: int
) -> np.ndarray:
    """Frequencies at which :func:`periodogram` reports, without any data.

    Parameters
    ----------
    samples : int  Output sample intervals in the window [1]
    duration_s : float  Length of the window [s]
    segments : int  Segments per trajectory [1]
    oversample : int  Fine bins per output sample interval [1]

    Returns
    -------
    freqs : ndarray  f_j = j / T_seg, j = 1 .. n_seg/2 [Hz], T_seg = (samples // segments) * dt
    """
    n_seg, _, n_freq = _segment_layout(int(samples) * int(oversample), oversample, segments)
    t_seg = n_seg * float(duration_s) / int(samples)
    return np.arange(1, n_freq + 1) / t_seg


def _segment_ffts(
    bins: np.ndarray, dt_fine: float, oversample: int, segments: int
) -> tuple[np.ndarray, np.ndarray, float, bool]:
    """Return freqs, the DFTs X (segments, n_freq, S) at f_j, the scale and a 1-D flag."""
    x = np.asarray(bins, dtype=float)
    one_d = x.ndim == 1
    if one_d:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(f"bins must have shape (n_fine,) or (n_fine, S), got {x.shape}")
    if not dt_fine > 0:
        raise ValueError(f"dt_fine must be > 0, got {dt_fine!r}")
    _n_seg, n_len, n_freq = _segment_layout(x.shape[0], oversample, segments)
    x = x[: segments * n_len].reshape(segments, n_len, x.shape[1])
    x = x - x.mean(axis=1, keepdims=True)  # DC only; exact at the Fourier frequencies j != 0
    X = scipy.fft.rfft(x, axis=1)[:, 1 : n_freq + 1, :]
    t_seg = n_len * dt_fine
    freqs = np.arange(1, n_freq + 1) / t_seg
    # one-sided density of the fine-bin sequence [unit^2/Hz]: 2 dt |X|^2 / L, then undo the
    # boxcar average of width dt_fine: divide by sinc^2(f / fs_fine) = sinc^2(f dt_fine).
    gain = np.sinc(freqs * dt_fine) ** 2
    scale = 2.0 * dt_fine / n_len
    X = X * np.sqrt(scale / gain)[None, :, None]
    return freqs, X, t_seg, one_d


def periodogram(
    bins: np.ndarray, dt_fine: float, *, oversample: int, segments: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """One-sided periodogram estimate of the continuous-time spectrum of one trajectory.

    Parameters
    ----------
    bins : array (n_fine,) or (n_fine, S)  Exact time averages of the count(s) over fine bins
        of width ``dt_fine``, time along the first axis [count]; n_fine = samples * oversample
    dt_fine : float  Fine bin width, duration / n_fine [s]
    oversample : int  Fine bins per output sample interval (e.g. 8) [1]
    segments : int  Non-overlapping segments the record is cut into; their periodograms are
        averaged.  Samples beyond ``segments * (samples // segments)`` are not used [1]

    Returns
    -------
    freqs : ndarray (n_freq,)  f_j = j / T_seg, j = 1 .. n_seg/2 [Hz], where n_seg =
        samples // segments and T_seg = n_seg * oversample * dt_fine, i.e. up to the OUTPUT
        Nyquist frequency fs/2 = samples / (2 duration).  (With oversample = 1 the Nyquist
        bin itself is left out, see Notes.)
    P : ndarray (n_freq,) or (S, n_freq)  Mean over this trajectory's segments of the
        one-sided periodogram [unit^2/Hz] -- frequency on the LAST axis.  Each value is, per
        segment, an estimate with 2 degrees of freedom: the mean over K segments in all
        (segments * trajectories) has nu = 2K, see :func:`welch_interval`.

    Raises
    ------
    ValueError  if the record is too short or not a multiple of ``oversample``.

    Notes
    -----
    The design.  The engine records the exact average of the count over each fine bin, i.e.
    the continuous-time process x(t) passed through a boxcar of width dt_fine = 1/fs_fine and
    sampled at fs_fine = oversample * fs.  The fine sequence therefore has the spectrum

        S_d(f) = sum_k S(f + k fs_fine) sinc^2((f + k fs_fine) / fs_fine),        (1)

    sinc(x) = sin(pi x)/(pi x).  Only frequencies up to the output Nyquist frequency
    fs/2 = fs_fine / (2 oversample) are reported, and there the estimate is divided by the
    k = 0 filter factor sinc^2(f / fs_fine) (at most 1.3 % for oversample = 8) to undo the
    averaging.  What remains is aliasing from the fine rate, k != 0 in (1):

    * a spectrum white up to well past fs_fine: sum_k sinc^2(x + k) = 1, so the estimate is
      S / sinc^2(f/fs_fine), a relative bias of about (pi f / fs_fine)^2 / 3: +0.21 % at fs/5
      and +1.3 % at fs/2 (oversample = 8).  This is the worst case;
    * a Lorentzian with its corner at 10 fs: +0.09 % at fs/5, +0.56 % at fs/2;
    * a Lorentzian with its corner at or below fs: below 2e-4 at fs/2.

    The periodogram of segment m with L = n_seg * oversample fine values y_n (the segment
    mean subtracted -- this changes only the DC term, which is not reported) is

        P_j = 2 dt_fine / L |sum_n y_n exp(-2 pi i j n / L)|^2 / sinc^2(f_j dt_fine),   (2)

    one-sided (twice the two-sided density; there is no DC term).  Without the sinc factor,
    sum_j P_j df over all j = 1 .. L/2 would be exactly the mean square of y (Parseval), so
    sum(P) * df over the reported band approximates the variance of the process minus its
    power above fs/2.

    Rectangular window.  Each segment is used as it is (no taper), so every reported value
    has 2 degrees of freedom and neighbouring values are nearly independent.  The price is
    leakage for red spectra: for a Lorentzian of correlation time tau the expected
    periodogram at the Fourier frequencies is, exactly in continuous time,

        E P(f) = S(f) [1 - (1 - exp(-T/tau)) (1 - u^2) / ((T/tau) (1 + u^2))],  u = f/f_c,  (3)

    (Wiener-Khinchin with the triangular lag window of a record of length T; derived here,
    see :func:`rectangular_window_factor`): a relative bias of about tau/T_seg, negative
    below the corner and positive above it.  Keep T_seg >= 100 tau for 1 %, or fit with
    ``segment_duration`` (:func:`fit_lorentzian`), which uses (3).

    References
    ----------
    P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra",
    IEEE Trans. Audio Electroacoust. 15, 70 (1967).

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(1).normal(size=(1024 * 8, 2))
    >>> f, P = periodogram(x, 1e-9, oversample=8, segments=4)
    >>> f.shape, P.shape
    ((128,), (2, 128))
    """
    freqs, X, _, one_d = _segment_ffts(bins, dt_fine, int(oversample), int(segments))
    P = np.mean(X.real**2 + X.imag**2, axis=0).T  # (S, n_freq)
    return freqs, (P[0] if one_d else P)


def cross_periodogram(
    bins: np.ndarray, dt_fine: float, *, oversample: int, segments: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """One-sided cross-spectral matrix estimate of one trajectory (see :func:`periodogram`).

    Parameters
    ----------
    bins : array (n_fine, S)  Fine-bin averages, time along the first axis [count]
    dt_fine : float  Fine bin width [s]
    oversample : int  Fine bins per output sample interval [1]
    segments : int  Segments per trajectory [1]

    Returns
    -------
    freqs : ndarray (n_freq,)  [Hz]
    P : complex ndarray (S, S, n_freq)  P[a, b] = mean over segments of the scaled
        X_a conj(X_b), X = sum_n y_n exp(-2 pi i j n / L) [unit^2/Hz]; Hermitian in (a, b),
        real diagonal equal to :func:`periodogram`; the same convention as the linear-noise
        matrix 2 (i w - A)^-1 D (-i w - A^T)^-1.  Feed it to :func:`current_psd_from_matrix`.

    Notes
    -----
    The same boxcar acts on every species, so the correction 1/sinc^2(f dt_fine) applies
    to the cross terms unchanged.  The periodogram of any linear combination of the counts
    (e.g. the current a_e N_e + a_h N_h) is the same combination of this matrix, exactly.
    """
    x = np.asarray(bins, dtype=float)
    if x.ndim != 2:
        raise ValueError(f"bins must have shape (n_fine, S), got {x.shape}")
    freqs, X, _, _ = _segment_ffts(x, dt_fine, int(oversample), int(segments))
    P = np.einsum("mja,mjb->abj", X, X.conj()) / X.shape[0]
    return freqs, P


# --------------------------------------------------------------------------------------------
# Intervals and segmenting
# --------------------------------------------------------------------------------------------
def welch_interval(
    psd_mean: np.ndarray | float,
    n_segments_total: np.ndarray | float,
    *,
    level: float = 0.95,
    dof_per_segment: int = 2,
) -> tuple[np.ndarray, np.ndarray]:
    """Chi-squared confidence interval of an averaged periodogram.

    Parameters
    ----------
    psd_mean : array  Mean of K periodogram values, S_hat [unit^2/Hz]
    n_segments_total : int or array  K, the number of averaged segments over all
        trajectories (broadcasts against ``psd_mean``) [1]
    level : float  Two-sided confidence level [1]
    dof_per_segment : int  Degrees of freedom of one periodogram value: 2 for every value
        :func:`periodogram` reports (1 only at DC or at the Nyquist frequency of the sampled
        sequence, which it leaves out) [1]

    Returns
    -------
    low, high : ndarray  Interval for S [unit^2/Hz]

    Notes
    -----
    With nu = dof_per_segment * K, nu S_hat / S is distributed as chi^2_nu (Welch 1967,
    for a Gaussian process and independent segments; asymptotically for any process at
    frequencies where the periodogram values are independent), so with a = 1 - level

        S in [nu S_hat / chi2.ppf(1 - a/2, nu),  nu S_hat / chi2.ppf(a/2, nu)].

    K = 16 gives [0.647, 1.750] S_hat.

    References
    ----------
    P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70 (1967).
    """
    if not 0 < level < 1:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    k = np.asarray(n_segments_total, dtype=float)
    if np.any(k <= 0):
        raise ValueError("n_segments_total must be > 0")
    nu = dof_per_segment * k
    a = 1.0 - level
    s = np.asarray(psd_mean, dtype=float)
    return nu * s / _chi2().ppf(1 - a / 2, nu), nu * s / _chi2().ppf(a / 2, nu)


def segments_from_interval(
    psd: np.ndarray, low: np.ndarray, high: np.ndarray, *, level: float = 0.95
) -> float:
    """Recover the number of averaged segments K from chi-squared intervals.

    Parameters
    ----------
    psd, low, high : array  Estimate and its interval as :func:`welch_interval` made them
        [unit^2/Hz]
    level : float  The interval's confidence level [1]

    Returns
    -------
    K : float  Solves chi2.ppf(1-a/2, 2K) / chi2.ppf(a/2, 2K) = median(high / low) [1]

    Raises
    ------
    ValueError  if no finite positive interval is given.
    """
    lo = np.asarray(low, dtype=float)
    hi = np.asarray(high, dtype=float)
    ok = np.isfinite(lo) & np.isfinite(hi) & (lo > 0) & (hi > lo)
    if not np.any(ok):
        raise ValueError("no finite positive interval to read the number of segments from")
    ratio = float(np.median(hi[ok] / lo[ok]))
    a = 1.0 - level

    def g(log_k: float) -> float:
        nu = 2.0 * math.exp(log_k)
        return math.log(_chi2().ppf(1 - a / 2, nu) / _chi2().ppf(a / 2, nu)) - math.log(
            ratio
        )

    lo_k, hi_k = math.log(0.05), math.log(1e9)
    if g(hi_k) > 0:
        return math.exp(hi_k)
    if g(lo_k) < 0:
        return math.exp(lo_k)
    return math.exp(optimize.brentq(g, lo_k, hi_k, xtol=1e-10))


def choose_segments(trajectories: int, samples: int) -> int:
    """Segments per trajectory for an averaged periodogram.

    Parameters
    ----------
    trajectories : int  Ensemble size [1]
    samples : int  Output samples per trajectory [1]

    Returns
    -------
    segments : int  1 when trajectories >= 16; otherwise the fewest segments that make
        trajectories * segments >= 16, but never so many that a segment has fewer than 64
        output samples (then as many as allow 64, at least 1) [1]

    Notes
    -----
    Sixteen averaged segments give a 95 % interval of [0.647, 1.750] times the estimate
    (Welch 1967); fewer segments keep the longest segments, hence the lowest frequency
    1/T_seg and the smallest rectangular-window leakage (about tau/T_seg).
    """
    trajectories = int(trajectories)
    samples = int(samples)
    if trajectories < 1 or samples < 1:
        raise ValueError("trajectories and samples must be >= 1")
    if trajectories >= 16:
        return 1
    want = -(-16 // trajectories)
    return max(1, min(want, samples // 64))


# --------------------------------------------------------------------------------------------
# Current
# --------------------------------------------------------------------------------------------
def _field(readout: Any, name: str) -> float:
    if isinstance(readout, Mapping):
        return float(readout[name])
    return float(getattr(readout, name))


def current_scale(readout: Any) -> tuple[float, float]:
    """Current carried per free electron and per free hole in a biased bar.

    Parameters
    ----------
    readout : object or mapping with ``bias_V`` [V], ``length_cm`` L [cm],
        ``electron_mobility_cm2_Vs`` mu_n and ``hole_mobility_cm2_Vs`` mu_p [cm^2/(V s)]

    Returns
    -------
    a_e, a_h : float  Current per electron and per hole in the bar [A per count]

    Notes
    -----
    Ohmic drift in a field bias/L: a carrier of mobility mu crosses in t_tr = L^2/(mu bias)
    and carries q/t_tr, so

        I = q bias / L^2 (mu_n N_e + mu_p N_h)

    (common photoconductor theory, from memory).  cm^2/(V s) * V / cm^2 = 1/s: the result
    is in A.
    """
    bias = _field(readout, "bias_V")
    length = _field(readout, "length_cm")
    if not length > 0:
        raise ValueError(f"readout length_cm must be > 0, got {length!r}")
    k = ELEMENTARY_CHARGE_C * bias / length**2
    return (
        k * _field(readout, "electron_mobility_cm2_Vs"),
        k * _field(readout, "hole_mobility_cm2_Vs"),
    )


def current_psd_from_matrix(S_matrix: np.ndarray, a_e: float, a_h: float) -> np.ndarray:
    """Spectrum of the current I = a_e N_e + a_h N_h from the count spectral matrix.

    Parameters
    ----------
    S_matrix : array (species, species, f)  One-sided spectral matrix of the counts; species
        0 are electrons, 1 holes (further species are ignored) [counts^2/Hz]
    a_e, a_h : float  Current per electron and per hole [A]

    Returns
    -------
    S_I : ndarray (f,)  a_e^2 S_ee + 2 a_e a_h Re S_eh + a_h^2 S_hh [A^2/Hz]
    """
    S = np.asarray(S_matrix)
    if S.ndim != 3 or S.shape[0] < 2 or S.shape[1] < 2:
        raise ValueError(f"S_matrix must have shape (species>=2, species>=2, f), got {S.shape}")
    return (
        a_e**2 * np.real(S[0, 0])
        + 2.0 * a_e * a_h * np.real(S[0, 1])
        + a_h**2 * np.real(S[1, 1])
    )


# --------------------------------------------------------------------------------------------
# Closed forms
# --------------------------------------------------------------------------------------------
def lorentzian(f: np.ndarray | float, var: float, tau: float) -> np.ndarray:
    """One-sided spectrum of a one-variable G-R process.

    Parameters
    ----------
    f : array  Frequency [Hz]
    var : float  Variance of the fluctuation [unit^2]
    tau : float  Relaxation time [s]

    Returns
    -------
    S : ndarray  4 var tau / (1 + (2 pi f tau)^2) [unit^2/Hz]

    References
    ----------
    K. M. van Vliet, "Noise in semiconductors and photoconductors", Proc. IRE 46, 1004
    (1958) (from memory).
    """
    f = np.asarray(f, dtype=float)
    return 4.0 * var * tau / (1.0 + (2.0 * np.pi * f * tau) ** 2)


def photoconductor_gr_psd(
    f: np.ndarray | float, current: float, gain: float, tau: float
) -> np.ndarray:
    """G-R current noise of a photoconductor.

    Parameters
    ----------
    f : array  Frequency [Hz]
    current : float  Mean current I [A]
    gain : float  Photoconductive gain G = tau / t_tr [1]
    tau : float  Carrier lifetime [s]

    Returns
    -------
    S_I : ndarray  4 q G I / (1 + (2 pi f tau)^2) [A^2/Hz]

    Notes
    -----
    Equivalent to 4 I^2 tau / (N_0 (1 + (2 pi f tau)^2)) when var(N) = N_0 (Poisson
    carriers, one carrier type conducting).

    References
    ----------
    K. M. van Vliet, Proc. IRE 46, 1004 (1958), and common photoconductor theory (from
    memory).
    """
    f = np.asarray(f, dtype=float)
    return 4.0 * ELEMENTARY_CHARGE_C * gain * abs(current) / (1.0 + (2.0 * np.pi * f * tau) ** 2)


def shot_noise_psd(current: np.ndarray | float) -> np.ndarray:
    """One-sided shot noise of a collected current.

    Parameters
    ----------
    current : array  Mean current I (its sign is ignored) [A]

    Returns
    -------
    S_I : ndarray  2 q |I| [A^2/Hz]

    References
    ----------
    W. Schottky, "Ueber spontane Stromschwankungen in verschiedenen
    Elektrizitaetsleitern", Ann. Phys. 57, 541 (1918).
    """
    return 2.0 * ELEMENTARY_CHARGE_C * np.abs(np.asarray(current, dtype=float))


def rectangular_window_factor(
    f: np.ndarray | float, f_c: float, segment_duration: float | None
) -> np.ndarray:
    """Expected periodogram / true spectrum of a Lorentzian process, rectangular window.

    Parameters
    ----------
    f : array  Fourier frequencies j / T of the segment [Hz]
    f_c : float  Corner frequency 1/(2 pi tau) [Hz]
    segment_duration : float or None  T, the segment length [s]; None gives 1

    Returns
    -------
    factor : ndarray  1 - (1 - exp(-T/tau)) (1 - u^2) / ((T/tau) (1 + u^2)), u = f/f_c [1]

    Notes
    -----
    For R(s) = var exp(-|s|/tau), the expected periodogram of a record of length T is
    int_{-T}^{T} (1 - |s|/T) R(s) exp(-2 pi i f s) ds (Wiener-Khinchin; the triangular lag
    window is the rectangular data window).  With b = 1/tau + 2 pi i f this is
    2 var Re[1/b - (1 - exp(-b T)) / (b^2 T)]; at f = j/T, exp(-b T) = exp(-T/tau), which
    gives the factor above (derived here).  It tends to 1 - tau/T below the corner and
    1 + tau/T above it.
    """
    f = np.asarray(f, dtype=float)
    if segment_duration is None:
        return np.ones_like(f)
    a_t = 2.0 * np.pi * f_c * segment_duration  # T / tau
    u2 = (f / f_c) ** 2
    return 1.0 - (-np.expm1(-a_t)) * (1.0 - u2) / (a_t * (1.0 + u2))


# --------------------------------------------------------------------------------------------
# Lorentzian fits
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LorentzianFit:
    """One Lorentzian component S(f) = S0 / (1 + (f/f_c)^2) fitted to a spectrum estimate.

    Attributes
    ----------
    S0, S0_err : float  Plateau and its standard error [unit^2/Hz]
    f_c, f_c_err : float  Corner frequency and its standard error [Hz]
    tau, tau_err : float  1 / (2 pi f_c) and its standard error [s]
    chi2_dof : float  Reduced chi-squared of the whole fit (all components) [1]
    p_value : float  Probability of a chi-squared at least this large if the model is right
        [1]
    dof : int  Points minus fitted parameters [1]
    ok : bool  Converged, corner inside the resolved band, errors finite and below 50 %,
        and the model not rejected (p_value >= 1e-3)
    message : str  Why ``ok`` is False, or empty
    """

    S0: float
    S0_err: float
    f_c: float
    f_c_err: float
    tau: float
    tau_err: float
    chi2_dof: float
    p_value: float
    dof: int
    ok: bool
    message: str = ""

    @property
    def variance(self) -> float:
        """Variance under the component, pi S0 f_c / 2 [unit^2]."""
        return 0.5 * math.pi * self.S0 * self.f_c


@dataclass(frozen=True)
class SpectrumAnalysis:
    """What :func:`analyse_spectrum` found.

    Attributes
    ----------
    kind : "one" | "two" | "unresolved"
    components : tuple of LorentzianFit  By ascending corner frequency; empty when
        unresolved
    chi2_dof, p_value : float  Of the accepted model (of the one-Lorentzian fit when
        unresolved, NaN if there was none) [1]
    band : (float, float)  Lowest and highest frequency used [Hz]
    n_segments : float  K used for the weights [1]
    message : str  A sentence for a human (why a fit was refused, or what was found)
    """

    kind: Literal["one", "two", "unresolved"]
    components: tuple[LorentzianFit, ...]
    chi2_dof: float
    p_value: float
    band: tuple[float, float]
    n_segments: float
    message: str

    @property
    def corner_frequencies(self) -> tuple[float, ...]:
        """Corner frequencies of the components [Hz]."""
        return tuple(c.f_c for c in self.components)

    def as_dict(self) -> dict[str, Any]:
        """Flat dict (kind, message, chi2_dof, p_value, then S0_1, f_c_1, tau_1 ... ) for
        storing as attributes or variables."""
        out: dict[str, Any] = {
            "kind": self.kind,
            "message": self.message,
            "chi2_dof": self.chi2_dof,
            "p_value": self.p_value,
            "band_low_Hz": self.band[0],
            "band_high_Hz": self.band[1],
            "n_segments": self.n_segments,
        }
        for i, c in enumerate(self.components, start=1):
            for key, val in asdict(c).items():
                if key not in ("chi2_dof", "p_value", "dof", "message"):
                    out[f"{key}_{i}"] = val
        return out


def _prepare(
    freqs: np.ndarray,
    psd: np.ndarray,
    low: np.ndarray | None,
    high: np.ndarray | None,
    n_segments: float | None,
    band: tuple[float, float] | None,
    level: float,
    exclude: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """Usable points: finite, f > 0, S > 0, inside the band, not excluded (``exclude`` True,
    e.g. :func:`drive_line_mask`).  Returns f, S, K, mask."""
    f = np.asarray(freqs, dtype=float)
    s = np.asarray(psd, dtype=float)
    if f.shape != s.shape or f.ndim != 1:
        raise ValueError(f"freqs and psd must be 1-D of one length, got {f.shape}, {s.shape}")
    if n_segments is None:
        if low is None or high is None:
            raise ValueError("give n_segments or the interval (low, high)")
        n_segments = segments_from_interval(s, np.asarray(low), np.asarray(high), level=level)
    if not n_segments > 0:
        raise ValueError(f"n_segments must be > 0, got {n_segments!r}")
    keep = np.isfinite(f) & np.isfinite(s) & (f > 0) & (s > 0)
    if band is not None:
        keep &= (f >= band[0]) & (f <= band[1])
    if exclude is not None:
        keep &= ~np.asarray(exclude, dtype=bool)
    return f[keep], s[keep], float(n_segments), keep


#: Fourier bins on each side of a drive line (and of each harmonic) left out of the fits: the
#: line of a drive whose frequency is not on the segment's Fourier grid leaks into its
#: neighbours as sinc^2 (rectangular window; Harris, Proc. IEEE 66, 51, 1978), about 1/(pi m)^2
#: of its power m bins away.
DRIVE_LINE_HALF_WIDTH = 3


def drive_line_mask(freqs: np.ndarray, drive_Hz: float | None, *,
                    half_width: int = DRIVE_LINE_HALF_WIDTH) -> np.ndarray:
    """Frequencies within ``half_width`` bins of a drive frequency or of one of its
    harmonics k f_d (k = 1, 2, ...), which a modulated source puts into the spectrum as
    deterministic lines, not noise (a square wave has odd harmonics, and a nonlinear
    response adds even ones).

    Parameters
    ----------
    freqs : ndarray  Uniform frequency grid of the spectrum [Hz]
    drive_Hz : float or None  Drive frequency f_d; None or 0: no drive [Hz]
    half_width : int  Bins left out on each side [1]

    Returns
    -------
    ndarray of bool  True where a point is to be left out of a Lorentzian fit
    """
    f = np.asarray(freqs, dtype=float)
    if not drive_Hz or drive_Hz <= 0 or f.size < 2:
        return np.zeros(f.shape, dtype=bool)
    df = float(np.median(np.diff(f)))
    nearest = np.maximum(np.rint(f / drive_Hz), 1.0) * drive_Hz  # the closest harmonic
    return np.abs(f - nearest) <= (half_width + 0.5) * df


def _log_noise(k: float) -> tuple[float, float, float]:
    """Mean offset, variance and excess kurtosis of log(chi^2_{2K} / 2K)."""
    offset = float(special.digamma(k) - math.log(k))
    var = float(special.polygamma(1, k))
    kurt = float(special.polygamma(3, k) / var**2)
    return offset, var, kurt


def _p_value(chi2: float, dof: int, kurt: float) -> float:
    """P(X >= chi2) for a sum of dof squared standardized log-chi^2 residuals.

    Each term has mean 1 and variance 2 + kurt (kurt: excess kurtosis of log chi^2), so the
    sum is matched in mean and variance by c chi^2_m with c = (2 + kurt)/2, m = 2 dof/(2+kurt)
    (Satterthwaite's moment matching; kurt -> 0 gives the ordinary chi-squared law).
    """
    if dof < 1:
        return float("nan")
    c = (2.0 + kurt) / 2.0
    return float(_chi2().sf(chi2 / c, 2.0 * dof / (2.0 + kurt)))


def _model_log(theta: np.ndarray, f: np.ndarray, t_seg: float | None) -> np.ndarray:
    total = np.zeros_like(f)
    # log parameters are clipped to the float range: the optimizer may probe wild values
    theta = np.clip(theta, -700.0, 700.0)
    for i in range(0, theta.size, 2):
        s0, fc = math.exp(theta[i]), math.exp(theta[i + 1])
        total += s0 / (1.0 + (f / fc) ** 2) * rectangular_window_factor(f, fc, t_seg)
    return np.log(np.maximum(total, 1e-300))


@dataclass
class _Fit:
    """Raw result in log parameters (log S0_1, log f_1, log S0_2, log f_2, ...)."""

    theta: np.ndarray
    cov: np.ndarray
    chi2: float
    success: bool
    dof: int
    p_value: float


def _least_squares(
    f: np.ndarray, s: np.ndarray, k: float, theta0: np.ndarray, t_seg: float | None
) -> _Fit:
    offset, var, kurt = _log_noise(k)
    y = np.log(s) - offset
    sigma = math.sqrt(var)

    def resid(th: np.ndarray) -> np.ndarray:
        return (y - _model_log(th, f, t_seg)) / sigma

    dof = f.size - theta0.size
    bad = np.full((theta0.size, theta0.size), np.nan)
    try:
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            res = optimize.least_squares(resid, theta0, method="trf", max_nfev=2000)
    except (ValueError, FloatingPointError, OverflowError, ZeroDivisionError):
        return _Fit(theta0, bad, float("inf"), False, dof, float("nan"))
    try:
        cov = np.linalg.inv(res.jac.T @ res.jac)
    except np.linalg.LinAlgError:
        cov = bad
    chi2 = float(np.sum(res.fun**2))
    return _Fit(res.x, cov, chi2, bool(res.success), dof, _p_value(chi2, dof, kurt))


def _order(theta: np.ndarray) -> np.ndarray:
    """Index that sorts the (log S0, log f_c) pairs by corner."""
    return np.ravel([[2 * i, 2 * i + 1] for i in np.argsort(theta[1::2])])


def _component(
    theta: np.ndarray, j: int, var_log: np.ndarray, fit: _Fit, band: tuple[float, float]
) -> LorentzianFit:
    s0, fc = math.exp(theta[j]), math.exp(theta[j + 1])
    rel_s0 = math.sqrt(var_log[j]) if var_log[j] >= 0 else float("nan")
    rel_fc = math.sqrt(var_log[j + 1]) if var_log[j + 1] >= 0 else float("nan")
    tau = 1.0 / (2.0 * math.pi * fc)
    chi2_dof = fit.chi2 / fit.dof
    problems = []
    if not fit.success:
        problems.append("the fit did not converge")
    if fc < band[0]:
        problems.append(
            f"corner {fc:.3g} Hz below the lowest resolved frequency {band[0]:.3g} Hz "
            "(record or segment too short to see the plateau)"
        )
    elif fc > band[1]:
        problems.append(
            f"corner {fc:.3g} Hz above the highest resolved frequency {band[1]:.3g} Hz "
            "(the spectrum is white in the band: sample faster)"
        )
    if not (np.isfinite(rel_s0) and np.isfinite(rel_fc)):
        problems.append("standard errors undetermined")
    elif rel_fc > 0.5 or rel_s0 > 0.5:
        problems.append(f"poorly determined (relative errors S0 {rel_s0:.2f}, f_c {rel_fc:.2f})")
    if np.isfinite(fit.p_value) and fit.p_value < P_REJECT:
        problems.append(f"model rejected (chi2/dof = {chi2_dof:.3g}, p = {fit.p_value:.2g})")
    return LorentzianFit(
        S0=s0,
        S0_err=s0 * rel_s0,
        f_c=fc,
        f_c_err=fc * rel_fc,
        tau=tau,
        tau_err=tau * rel_fc,
        chi2_dof=chi2_dof,
        p_value=fit.p_value,
        dof=fit.dof,
        ok=not problems,
        message="; ".join(problems),
    )


def _components(
    fit: _Fit, band: tuple[float, float], var_log: np.ndarray | None = None
) -> tuple[LorentzianFit, ...]:
    """LorentzianFit per component, by ascending corner.

    ``fit.theta`` is already sorted by corner; ``var_log`` (same order) replaces the
    diagonal of the covariance when given.
    """
    v = np.diag(fit.cov) if var_log is None else np.asarray(var_log)
    comps = [_component(fit.theta, j, v, fit, band) for j in range(0, fit.theta.size, 2)]
    if len(comps) == 2:
        ratio = comps[1].f_c / comps[0].f_c
        if not ratio > 1.5:
            msg = f"corners within a factor {ratio:.2g}: not separable"
            comps = [replace(c, ok=False, message="; ".join(m for m in (c.message, msg) if m))
                     for c in comps]
    return tuple(comps)


def _guess_one(f: np.ndarray, s: np.ndarray) -> np.ndarray:
    n_low = max(3, f.size // 20)
    s0 = float(np.exp(np.mean(np.log(s[:n_low]))))
    w = max(1, f.size // 50)
    smooth = np.exp(np.convolve(np.log(s), np.ones(w) / w, mode="same"))
    below = np.nonzero(smooth < 0.5 * s0)[0]
    fc = float(f[below[0]]) if below.size else float(f[-1])
    return np.log([s0, max(fc, f[0])])


def _fit_one(f: np.ndarray, s: np.ndarray, k: float, t_seg: float | None) -> _Fit | None:
    if f.size < 2 * _MIN_POINTS_PER_PARAMETER:
        return None
    return _least_squares(f, s, k, _guess_one(f, s), t_seg)


def _fit_two(f: np.ndarray, s: np.ndarray, k: float, t_seg: float | None) -> _Fit | None:
    if f.size < 4 * _MIN_POINTS_PER_PARAMETER:
        return None
    lf = np.log(f)
    grid = np.exp(np.linspace(lf[0], lf[-1], 7))
    best: _Fit | None = None
    for i, f1 in enumerate(grid):
        for f2 in grid[i + 2 :]:
            # amplitudes by linear least squares in relative terms, then refine in log space
            A = np.stack([1.0 / (1.0 + (f / f1) ** 2), 1.0 / (1.0 + (f / f2) ** 2)], axis=1)
            amp, *_ = np.linalg.lstsq(A / s[:, None], np.ones_like(s), rcond=None)
            amp = np.maximum(amp, 1e-3 * np.max(s))
            fit = _least_squares(f, s, k, np.log([amp[0], f1, amp[1], f2]), t_seg)
            if best is None or fit.chi2 < best.chi2:
                best = fit
    assert best is not None
    idx = _order(best.theta)
    best.theta = best.theta[idx]
    best.cov = best.cov[np.ix_(idx, idx)]
    return best


def _too_few(n: int, what: str) -> LorentzianFit:
    nan = float("nan")
    return LorentzianFit(nan, nan, nan, nan, nan, nan, nan, nan, 0, False,
                         f"only {n} usable points: too few for {what}")


def fit_lorentzian(
    freqs: np.ndarray,
    psd: np.ndarray,
    low: np.ndarray | None = None,
    high: np.ndarray | None = None,
    *,
    n_segments: float | None = None,
    segment_duration: float | None = None,
    band: tuple[float, float] | None = None,
    level: float = 0.95,
) -> LorentzianFit:
    """Fit S(f) = S0 / (1 + (f/f_c)^2) to an averaged periodogram.

    Parameters
    ----------
    freqs : array  Frequencies [Hz]
    psd : array  Averaged periodogram, one-sided [unit^2/Hz]
    low, high : array  Its chi-squared interval (used only to read K when ``n_segments`` is
        not given) [unit^2/Hz]
    n_segments : float, optional  K, periodogram values averaged per frequency [1]
    segment_duration : float, optional  T_seg [s]: fit the expected rectangular-window
        periodogram (:func:`rectangular_window_factor`) instead of the bare Lorentzian,
        which removes the leakage bias of about tau/T_seg.  Leave None for a spectrum that
        is not a raw periodogram
    band : (float, float), optional  Fit only f_lo <= f <= f_hi [Hz]
    level : float  Confidence level of (low, high) [1]

    Returns
    -------
    LorentzianFit

    Notes
    -----
    Weighted least squares in log space.  An average of K periodogram values is
    S chi^2_{2K} / 2K, so log S_hat = log S + e with E e = psi(K) - log K (psi the digamma
    function; -0.031 for K = 16) and var e = psi'(K), the same at every frequency.  The fit
    subtracts that known offset and weights all points equally with sigma^2 = psi'(K)
    (~1/K), so unlike fits weighted by the noisy values themselves it is unbiased, and the
    standard errors come from the Jacobian with this known sigma (not rescaled by chi2).
    The goodness of fit uses the moment-matched law of the sum of squared residuals
    (log chi^2 has excess kurtosis psi^(3)(K) / psi'(K)^2).

    These standard errors assume independent periodogram values, exact for a Gaussian
    process.  A strongly non-Gaussian signal correlates them (one trap's telegraph signal:
    the level above the corner follows the number of switches in the record), and then the
    error of f_c is too small -- by about 22 % for a single telegraph signal with K = 16,
    measured over 60 records.  :func:`analyse_spectrum` with ``batches`` gives jackknife
    errors that honour this.
    """
    f, s, k, _ = _prepare(freqs, psd, low, high, n_segments, band, level)
    fit = _fit_one(f, s, k, segment_duration)
    if fit is None:
        return _too_few(f.size, "a fit")
    return _components(fit, (float(f[0]), float(f[-1])))[0]


def fit_two_lorentzians(
    freqs: np.ndarray,
    psd: np.ndarray,
    low: np.ndarray | None = None,
    high: np.ndarray | None = None,
    *,
    n_segments: float | None = None,
    segment_duration: float | None = None,
    band: tuple[float, float] | None = None,
    level: float = 0.95,
) -> tuple[LorentzianFit, LorentzianFit]:
    """Fit S(f) = S0_1 / (1 + (f/f_1)^2) + S0_2 / (1 + (f/f_2)^2), f_1 < f_2.

    Same parameters and method as :func:`fit_lorentzian`; several starting pairs of corners
    spread over the band are tried and the best fit kept.

    Returns
    -------
    (slow, fast) : LorentzianFit, LorentzianFit  Sorted by corner frequency; both carry the
        joint fit's chi2_dof and p_value.  ``ok`` is False on a component whose corner is
        outside the band or undetermined, or when the two corners are within a factor 1.5
        (then they are not separable).
    """
    f, s, k, _ = _prepare(freqs, psd, low, high, n_segments, band, level)
    fit = _fit_two(f, s, k, segment_duration)
    if fit is None:
        bad = _too_few(f.size, "two Lorentzians")
        return bad, bad
    slow, fast = _components(fit, (float(f[0]), float(f[-1])))
    return slow, fast


def _fourier_segment_duration(f: np.ndarray) -> float | None:
    """T_seg if f is the grid j/T_seg, j = 1, 2, ... (as periodogram makes it), else None."""
    if f.size < 2:
        return None
    df = f[1] - f[0]
    j = f / df
    if df > 0 and np.allclose(j, np.round(j), rtol=0, atol=1e-6) and round(j[0]) >= 1:
        return float(1.0 / df)
    return None


def _jackknife_var(
    f: np.ndarray, batches: np.ndarray, k: float, t_seg: float | None, fit: _Fit
) -> np.ndarray:
    """Jackknife variance of the log parameters over B equal batches: leave one batch out,
    refit from the full fit, (B-1)/B times the sum of squared deviations (Tukey 1958)."""
    b = batches.shape[0]
    total = batches.sum(axis=0)
    reps = []
    for i in range(b):
        s_i = (total - batches[i]) / (b - 1)
        use = s_i > 0
        rep = _least_squares(f[use], s_i[use], k * (b - 1) / b, fit.theta, t_seg)
        reps.append(rep.theta[_order(rep.theta)])
    th = np.array(reps)
    return (b - 1) / b * np.sum((th - th.mean(axis=0)) ** 2, axis=0)


def _batches_kept(batches: np.ndarray | None, keep: np.ndarray) -> np.ndarray | None:
    """The batch periodograms at the kept frequencies (checked for shape)."""
    if batches is None:
        return None
    bat = np.asarray(batches, dtype=float)
    if bat.ndim != 2 or bat.shape[1] != keep.size or bat.shape[0] < 2:
        raise ValueError(f"batches must have shape (B >= 2, {keep.size}), got {bat.shape}")
    return bat[:, keep]


def _analysis(kind: Any, comps: Any, fit: _Fit | None, band: tuple[float, float], k: float,
              msg: str) -> SpectrumAnalysis:
    nan = float("nan")
    return SpectrumAnalysis(kind=kind, components=tuple(comps),
                            chi2_dof=fit.chi2 / fit.dof if fit is not None else nan,
                            p_value=fit.p_value if fit is not None else nan, band=band,
                            n_segments=k, message=msg)


def _segment_duration_of(freqs: np.ndarray,
                         segment_duration: float | None | Literal["auto"]) -> float | None:
    """T_seg of :func:`analyse_spectrum`: the number given, or 1/df of a Fourier grid for
    "auto" (:func:`_fourier_segment_duration`) [s]."""
    if isinstance(segment_duration, str):
        if segment_duration != "auto":
            raise ValueError(
                f"segment_duration must be a number, None or 'auto', got {segment_duration!r}"
            )
        return _fourier_segment_duration(np.asarray(freqs, dtype=float))
    return segment_duration


def analyse_spectrum(
    freqs: np.ndarray,
    psd: np.ndarray,
    low: np.ndarray | None,
    high: np.ndarray | None,
    n_segments: float | None,
    *,
    segment_duration: float | None | Literal["auto"] = "auto",
    band: tuple[float, float] | None = None,
    level: float = 0.95,
    batches: np.ndarray | None = None,
    drive_Hz: float | None = None,
) -> SpectrumAnalysis:
    """Describe a G-R spectrum estimate by one or two Lorentzians, or refuse.

    Parameters
    ----------
    freqs, psd, low, high : array  Averaged periodogram and its interval (as in the output
        file) [Hz], [unit^2/Hz]
    n_segments : float or None  K; None reads it from the interval [1]
    segment_duration : float, None or "auto"  T_seg for the rectangular-window model (see
        :func:`fit_lorentzian`); "auto" takes 1/df when the frequencies are the Fourier grid
        j/T_seg that :func:`periodogram` makes, else None [s]
    band : (float, float), optional  Restrict the fit [Hz]
    level : float  Confidence level of (low, high) [1]
    batches : array (B, n_freq), optional  Mean periodograms of B >= 2 disjoint batches of
        equally many segments (e.g. groups of trajectories) whose mean is ``psd``.  Then the
        standard errors are jackknife errors over the batches, valid also for non-Gaussian
        signals (see :func:`fit_lorentzian`); B >= 8 advised [unit^2/Hz]
    drive_Hz : float, optional  Frequency of a periodic drive: its line and harmonics are
        left out of the fit (:func:`drive_line_mask`) [Hz]

    Returns
    -------
    SpectrumAnalysis  kind "one" when one Lorentzian describes the spectrum (p >= 1e-3);
        "two" when it does not but two with separable corners inside the band do; otherwise
        "unresolved", with a message that says why (e.g. "corner below the lowest resolved
        frequency").

    References
    ----------
    M. H. Quenouille, "Notes on bias in estimation", Biometrika 43, 353 (1956); J. W. Tukey,
    "Bias and confidence in not-quite large samples", Ann. Math. Statist. 29, 614 (1958)
    (abstract; from memory).
    """
    f, s, k, keep = _prepare(freqs, psd, low, high, n_segments, band, level,
                             drive_line_mask(freqs, drive_Hz))
    t_seg = _segment_duration_of(freqs, segment_duration)
    bat = _batches_kept(batches, keep)
    nan = float("nan")
    band_used = (float(f[0]), float(f[-1])) if f.size else (nan, nan)

    def result(kind: Any, comps: Any, fit: _Fit | None, msg: str) -> SpectrumAnalysis:
        return _analysis(kind, comps, fit, band_used, k, msg)

    def with_errors(fit: _Fit) -> tuple[tuple[LorentzianFit, ...], str]:
        if bat is None:
            return _components(fit, band_used), ""
        var = _jackknife_var(f, bat, k, t_seg, fit)
        return (_components(fit, band_used, var),
                f"; standard errors: jackknife over {bat.shape[0]} batches")

    one = _fit_one(f, s, k, t_seg)
    if one is None:
        return result("unresolved", (), None, f"only {f.size} usable points: too few for a fit")
    if one.p_value >= P_REJECT:
        (c,), note = with_errors(one)
        if c.ok:
            return result(
                "one", (c,), one,
                f"one Lorentzian: f_c = {c.f_c:.4g} +/- {c.f_c_err:.2g} Hz, "
                f"S0 = {c.S0:.4g} +/- {c.S0_err:.2g} /Hz (chi2/dof = {one.chi2 / one.dof:.3f})"
                + note,
            )
        return result("unresolved", (), one, "one Lorentzian fits, but " + c.message)
    one_txt = f"chi2/dof = {one.chi2 / one.dof:.3g}, p = {one.p_value:.2g}"
    two = _fit_two(f, s, k, t_seg)
    if two is None:
        return result("unresolved", (), one,
                      f"one Lorentzian is rejected ({one_txt}) and there are too few points "
                      "for two")
    comps, note = with_errors(two)
    if all(c.ok for c in comps):
        return result(
            "two", comps, two,
            f"two Lorentzians (one is rejected: {one_txt}): f_c = "
            f"{comps[0].f_c:.4g} +/- {comps[0].f_c_err:.2g} Hz and "
            f"{comps[1].f_c:.4g} +/- {comps[1].f_c_err:.2g} Hz" + note,
        )
    return result("unresolved", (), one, _two_untrusted(one_txt, comps))


def _two_untrusted(one_txt: str, comps: tuple[LorentzianFit, ...]) -> str:
    """Message of :func:`analyse_spectrum` when one Lorentzian is rejected and the two
    components of the second fit are not trustworthy."""
    why = "; ".join(
        f"component {i}: {c.message}" for i, c in enumerate(comps, start=1) if c.message
    )
    return f"one Lorentzian is rejected ({one_txt}) and two are not trustworthy ({why})"


def drive_quadratures(bins: np.ndarray, dt_fine: float, frequency_Hz: float) -> np.ndarray:
    """Sine and cosine amplitudes of a record at a drive frequency (a digital lock-in).

    Least-squares fit of ``c + a sin(w t) + b cos(w t)`` to the fine-bin averages at the bin
    centres, with the bin-averaging factor sinc(f dt) divided out, so that for a response
    ``R sin(w t + phi)`` the expectation is ``a = R cos(phi)``, ``b = R sin(phi)``
    (a bin average of ``sin(w t + phi)`` over ``[t_j, t_j + dt]`` is
    ``sinc(f dt) sin(w t_mid + phi)``, exactly).

    Parameters
    ----------
    bins : ndarray (n_fine,) or (n_fine, S)  Exact time averages over fine bins [unit]
    dt_fine : float  Bin width [s]
    frequency_Hz : float  Drive frequency f [Hz]

    Returns
    -------
    ndarray (2,) or (2, S)  ``(a, b)`` [unit]
    """
    x = np.asarray(bins, dtype=float)
    n = x.shape[0]
    t_mid = (np.arange(n) + 0.5) * dt_fine
    w = 2.0 * math.pi * frequency_Hz
    design = np.column_stack([np.ones(n), np.sin(w * t_mid), np.cos(w * t_mid)])
    coef, *_ = np.linalg.lstsq(design, x, rcond=None)
    return coef[1:] / np.sinc(frequency_Hz * dt_fine)


def response_from_quadratures(quad: np.ndarray) -> tuple[np.ndarray, ...]:
    """Amplitude and phase, with standard errors, from per-trajectory quadratures.

    Parameters
    ----------
    quad : ndarray (n_traj, 2, ...)  ``(a, b)`` of each trajectory

    Returns
    -------
    amplitude, amplitude_stderr, phase [rad], phase_stderr [rad]  (first-order error
    propagation from the spread of a and b over trajectories; NaN errors for one trajectory)
    """
    q = np.asarray(quad, dtype=float)
    n = q.shape[0]
    a, b = q[:, 0].mean(axis=0), q[:, 1].mean(axis=0)
    if n > 1:
        sa = q[:, 0].std(axis=0, ddof=1) / math.sqrt(n)
        sb = q[:, 1].std(axis=0, ddof=1) / math.sqrt(n)
    else:
        sa = sb = np.full_like(a, np.nan)
    amp = np.hypot(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        amp_err = np.hypot(a * sa, b * sb) / amp
        phase_err = np.hypot(b * sa, a * sb) / amp**2
    return amp, amp_err, np.arctan2(b, a), phase_err
