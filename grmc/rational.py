"""Rational noise spectra: a white level plus Lorentzians, and their minimum-phase factor.

Every spectrum a circuit export writes as a network of elements has the form

    S(f) = c + sum_k a_k / (1 + (f / f_k)^2)          [unit^2/Hz, one-sided]

with corners ``f_k > 0``.  A fit of one or two Lorentzians above a shot level is of this form
with every ``a_k >= 0``, and so is the linear-noise spectrum of any quantity of the model
whose relaxation modes are real: its poles are the eigenvalues of the linear-noise Jacobian
(van Kampen, Stochastic Processes in Physics and Chemistry, 3rd ed., 2007, ch. X), and some
``a_k`` may then be negative (a junction's net current falls towards low frequencies).

:func:`spectral_factor` gives the minimum-phase ``H(s)`` with ``|H(i 2 pi f)|^2 = S(f)``:
stable poles ``-2 pi f_k`` and the zeros of ``S`` reflected into the left half-plane
(spectral factorisation of a rational spectrum; Papoulis & Pillai, Probability, Random
Variables and Stochastic Processes, 4th ed., 2002, section 11-1, from memory).  A single
white source driving ``H`` then has the spectrum ``S``.

Public API
----------
RationalSpectrum(white, corners, amplitudes)       S(f), as above
lna_rational(model, quantity="current")            the linear-noise spectrum in that form
Factor / spectral_factor(spec)                      H(s) = h0 + sum_k r_k / (s + w_k)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["RationalSpectrum", "Factor", "spectral_factor", "lna_rational", "positive_fit",
           "RELATIVE_CHECK"]

#: Largest relative error allowed when a rational form is checked against what it stands
#: for (the linear-noise curve it was fitted to, or the spectrum a factor must give) [1].
RELATIVE_CHECK = 1e-6


@dataclass(frozen=True)
class RationalSpectrum:
    """``S(f) = white + sum_k amplitudes[k] / (1 + (f / corners[k])^2)``.

    Attributes
    ----------
    white : float  High-frequency (white) level c >= 0 [unit^2/Hz]
    corners : ndarray (K,)  Corner frequencies f_k > 0, ascending [Hz]
    amplitudes : ndarray (K,)  Lorentzian plateaus a_k (any sign) [unit^2/Hz]
    """

    white: float
    corners: np.ndarray
    amplitudes: np.ndarray

    def __post_init__(self) -> None:
        f = np.atleast_1d(np.asarray(self.corners, dtype=float))
        a = np.atleast_1d(np.asarray(self.amplitudes, dtype=float))
        if f.shape != a.shape or f.ndim != 1:
            raise ValueError("corners and amplitudes must be 1-D of one length")
        if np.any(~np.isfinite(f)) or np.any(f <= 0) or np.any(~np.isfinite(a)):
            raise ValueError("corners must be finite and > 0, amplitudes finite")
        if not (math.isfinite(self.white) and self.white >= 0):
            raise ValueError(f"white level must be finite and >= 0, got {self.white!r}")
        order = np.argsort(f)
        object.__setattr__(self, "corners", f[order])
        object.__setattr__(self, "amplitudes", a[order])

    def __call__(self, f: np.ndarray | float) -> np.ndarray:
        """S(f) [unit^2/Hz] at frequencies f [Hz]."""
        f = np.asarray(f, dtype=float)
        u2 = (f[..., None] / self.corners) ** 2
        return self.white + np.sum(self.amplitudes / (1.0 + u2), axis=-1)

    @property
    def is_positive_sum(self) -> bool:
        """True when every Lorentzian has a plateau >= 0 (a bank of RC stages realises it)."""
        return bool(np.all(self.amplitudes >= 0.0))

    def describe(self) -> str:
        """One line: the white level and each corner with its plateau."""
        parts = [f"white {self.white:.6e}"]
        parts += [f"{a:+.6e} / (1 + (f/{f:.6e} Hz)^2)"
                  for f, a in zip(self.corners, self.amplitudes)]
        return " ".join(parts)


# --------------------------------------------------------------------------------------------
# The linear-noise spectrum in rational form
# --------------------------------------------------------------------------------------------
def _lna_poles(model) -> np.ndarray:
    """Relaxation rates of the linear-noise Jacobian as corner frequencies [Hz]."""
    from . import continuum

    res = continuum.lna(model)
    if res.reduced_jacobian.size == 0:
        return np.zeros(0)
    eig = np.linalg.eigvals(res.reduced_jacobian)
    if np.any(np.abs(eig.imag) > 1e-9 * np.abs(eig.real)):
        raise ValueError("the linear-noise Jacobian has complex eigenvalues (an oscillating "
                         "relaxation): not a sum of Lorentzians")
    rates = np.sort(-eig.real)
    if np.any(rates <= 0):
        raise ValueError("the linear-noise Jacobian has a mode that does not relax")
    keep = np.concatenate([[True], np.diff(np.log(rates)) > 1e-9])
    return rates[keep] / (2.0 * math.pi)


def _lna_curve(model, quantity: str):
    """The linear-noise spectrum of ``quantity`` as a function of f, and its white level."""
    from . import continuum
    from .readout import lna_current

    if quantity == "current":
        white = float(lna_current(model, np.array([0.0])).white)
        return (lambda f: lna_current(model, np.asarray(f, float)).psd), white
    if quantity not in model.output_species:  # a spread level's total among them
        raise ValueError(f"unknown quantity {quantity!r}")
    i = list(model.output_species).index(quantity)
    return (lambda f: np.real(model.project_matrix(
        continuum.lna_psd(model, np.asarray(f, float)))[i, i])), 0.0


def lna_rational(model, quantity: str = "current") -> RationalSpectrum:
    """The linear-noise spectrum of a quantity as white level plus Lorentzians.

    Parameters
    ----------
    model : grmc.model.Model
    quantity : str  "current" (the readout current; needs a ``[readout]``) or a species name

    Returns
    -------
    RationalSpectrum  Corners at the relaxation rates of the reduced linear-noise Jacobian,
        the white level from the theory (shot noise of all crossings, or 0), plateaus by
        linear least squares on the theory's spectrum, checked to :data:`RELATIVE_CHECK` on a
        dense grid spanning every corner [A^2/Hz or counts^2/Hz]

    Raises
    ------
    ValueError  when the modes are complex, a mode does not relax, or the rational form does
        not reproduce the theory (e.g. a repeated relaxation rate).

    Notes
    -----
    In the linear-noise approximation the fluctuation obeys ``dz/dt = A z + B xi`` with white
    ``xi`` and the quantity is ``C z + D xi``, so its spectrum is ``|D|^2 Q`` plus terms
    ``1 / (w^2 + l_k^2)`` for each eigenvalue ``-l_k`` of ``A`` (partial fractions of
    ``G(i w) Q G(-i w)^T``; van Kampen 2007, ch. X).  The plateaus are fitted rather than
    taken from an eigendecomposition so that the same code serves every readout the theory
    knows; the check on the dense grid makes the fit exact to the stated tolerance.
    """
    curve, white = _lna_curve(model, quantity)
    corners = _lna_poles(model)
    if corners.size == 0:
        return RationalSpectrum(white, np.zeros(0), np.zeros(0))
    lo, hi = math.log10(corners[0]) - 3.0, math.log10(corners[-1]) + 3.0
    f = np.logspace(lo, hi, max(64, int(40 * (hi - lo))))
    s = curve(f)
    basis = 1.0 / (1.0 + (f[:, None] / corners) ** 2)
    scale = np.where(s > 0, s, np.max(np.abs(s)))
    amp, *_ = np.linalg.lstsq(basis / scale[:, None], (s - white) / scale, rcond=None)
    spec = RationalSpectrum(white, corners, amp)
    check = np.logspace(lo, hi, 977)
    ref = curve(check)
    err = np.max(np.abs(spec(check) / ref - 1.0))
    if not err <= RELATIVE_CHECK:
        raise ValueError(f"the linear-noise spectrum is not reproduced by white + Lorentzians "
                         f"at its relaxation rates (relative error {err:.2g})")
    return spec


def positive_fit(f: np.ndarray, s: np.ndarray, *, per_decade: int = 4) -> RationalSpectrum:
    """A white level plus Lorentzians with plateaus >= 0 that follows a tabulated spectrum.

    Parameters
    ----------
    f : ndarray  Frequencies, ascending, > 0 [Hz]
    s : ndarray  Spectrum > 0 [unit^2/Hz]
    per_decade : int  Corners per decade, spread over the band of f and one decade beyond [1]

    Returns
    -------
    RationalSpectrum  Non-negative least squares in relative terms (scipy.optimize.nnls,
        Lawson & Hanson, Solving Least Squares Problems, 1974); components with zero plateau
        dropped.  A spectrum that falls towards low frequencies is not such a sum: the result
        then departs from it there, and the caller reports the deviation.
    """
    from scipy.optimize import nnls

    lo, hi = math.log10(f[0]) - 1.0, math.log10(f[-1]) + 1.0
    corners = np.logspace(lo, hi, int(per_decade * (hi - lo)) + 1)
    basis = np.column_stack([np.ones_like(f), 1.0 / (1.0 + (f[:, None] / corners) ** 2)])
    coef, _ = nnls(basis / s[:, None], np.ones_like(s), maxiter=50 * basis.shape[1])
    keep = coef[1:] > 0
    return RationalSpectrum(float(coef[0]), corners[keep], coef[1:][keep])


# --------------------------------------------------------------------------------------------
# Spectral factor
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Factor:
    """Minimum-phase spectral factor ``H(s) = h0 + sum_k residues[k] / (s + rates[k])``.

    Attributes
    ----------
    h0 : float  Direct term, sqrt(white) [unit/sqrt(Hz)]
    rates : ndarray (K,)  Pole magnitudes w_k = 2 pi f_k [rad/s]
    residues : ndarray (K,)  Real residues [unit/sqrt(Hz) rad/s]
    zeros : ndarray (Z,)  Zeros of H, all with real part <= 0 [rad/s]
    """

    h0: float
    rates: np.ndarray
    residues: np.ndarray
    zeros: np.ndarray

    def __call__(self, f: np.ndarray | float) -> np.ndarray:
        """H(i 2 pi f) [unit/sqrt(Hz)] at frequencies f [Hz]."""
        s = 2j * math.pi * np.asarray(f, dtype=float)
        return self.h0 + np.sum(self.residues / (s[..., None] + self.rates), axis=-1)


def _secular_roots(q: np.ndarray, b: np.ndarray, c: float) -> tuple[np.ndarray, float]:
    """Roots x and leading coefficient of
    N(x) = c prod (x + q_k) + sum_k b_k prod_{j != k} (x + q_j).

    N / D = g(x) = c + sum_k b_k / (x + q_k).  For c > 0, g = c det(I + (xI + Q)^-1 b 1^T / c),
    so the roots are the eigenvalues of -(Q + b 1^T / c) (a diagonal plus rank-one matrix;
    the matrix determinant lemma).  For c = 0 they are the finite eigenvalues of the pencil
    x [[I, 0], [0, 0]] + [[Q, b], [1^T, 0]] (bordered matrix), K - 1 of them when
    sum_k b_k != 0.  Corners spread over many decades leave the small eigenvalues
    inaccurate, so all are refined together by Aberth's iteration on N, with
    N'/N = g'/g + sum_k 1/(x + q_k) (O. Aberth, Math. Comp. 27, 339, 1973).
    """
    if c > 0:
        r = np.linalg.eigvals(-(np.diag(q) + np.outer(b, np.ones_like(b)) / c))
        lead = c
    else:
        from scipy.linalg import eigvals

        lead = float(np.sum(b))
        if not lead > 1e-12 * float(np.sum(np.abs(b))):
            raise ValueError("the spectrum without a white level is not positive at high "
                             "frequencies, or falls faster than 1/f^2")
        n = q.size
        a = np.zeros((n + 1, n + 1))
        a[:n, :n] = -np.diag(q)
        a[:n, n] = -b
        a[n, :n] = -1.0
        m = np.zeros((n + 1, n + 1))
        m[:n, :n] = np.eye(n)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = eigvals(a, m)
        r = r[np.isfinite(r)]
        r = r[np.argsort(np.abs(r))][: n - 1]
    # a conjugate pair of starting values stays conjugate under the iteration and could
    # never split onto two real roots: break the symmetry (deterministically)
    r = r.astype(complex) * (1.0 + 1e-3j * np.arange(1, r.size + 1) / max(r.size, 1))
    for _ in range(500):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            d = r[:, None] + q
            g = c + np.sum(b / d, axis=1)
            ratio = -np.sum(b / d**2, axis=1) / g + np.sum(1.0 / d, axis=1)
            step = 1.0 / ratio
            diff = r[:, None] - r[None, :]
            np.fill_diagonal(diff, np.inf)
            corr = step / (1.0 - step * np.sum(1.0 / diff, axis=1))
        corr = np.where(np.isfinite(corr), corr, 0.0)
        r = r - corr
        if np.all(np.abs(corr) <= 1e-15 * np.abs(r)):
            break
    return r, lead


def spectral_factor(spec: RationalSpectrum) -> Factor:
    """Minimum-phase factor ``H`` of a rational spectrum: ``|H(i 2 pi f)|^2 = S(f)``.

    Parameters
    ----------
    spec : RationalSpectrum  Must be > 0 at every f >= 0 (the white level may be 0)

    Returns
    -------
    Factor  Checked against ``spec`` to :data:`RELATIVE_CHECK` from 1e-3 of the lowest to
        1e3 times the highest corner

    Raises
    ------
    ValueError  when the spectrum is not positive or the factor does not reproduce it.

    Notes
    -----
    With x = (w / w0)^2, p_k = w_k / w0 (w0 the geometric mean of the poles, for a
    well-scaled polynomial), ``S = N(x) / D(x)``, ``D = prod (x + p_k^2)`` and
    ``N = c D + sum_k a_k p_k^2 prod_{j != k} (x + p_j^2)``, whose roots are found as the
    eigenvalues of a diagonal plus rank-one (c > 0) or bordered (c = 0) matrix, refined by
    Aberth's iteration (:func:`_secular_roots`).  A root r of N gives the zero
    ``z = -sqrt(-r)`` (the left half-plane one of the pair +-sqrt(-r)); then
    ``H(s) = sqrt(n_lead) prod (s/w0 - z_i) / prod (s/w0 + p_k)``, whose magnitude squared on
    the imaginary axis is N/D, with every pole and zero in the closed left half-plane
    (minimum phase; Papoulis & Pillai 2002, section 11-1, from memory).  H is stored in
    partial fractions (poles are distinct).
    """
    w = 2.0 * math.pi * spec.corners
    if w.size == 0:
        return Factor(math.sqrt(spec.white), w, np.zeros(0), np.zeros(0))
    w0 = float(np.exp(np.mean(np.log(w))))
    p = w / w0
    b = spec.amplitudes * p**2
    roots, lead = _secular_roots(p**2, b, spec.white)
    zeros = -np.sqrt(-roots)
    gain = math.sqrt(lead)
    residues = np.empty(w.size)
    for k in range(w.size):
        val = gain * np.prod(-p[k] - zeros) / np.prod(np.delete(p, k) - p[k])
        residues[k] = val.real
    h0 = gain if spec.white > 0 else 0.0
    fac = Factor(h0, w, residues * w0, zeros * w0)
    f = np.logspace(math.log10(spec.corners[0]) - 3, math.log10(spec.corners[-1]) + 3, 601)
    ref = spec(f)
    if np.any(ref <= 0):
        raise ValueError("the spectrum is not positive at every frequency")
    err = np.max(np.abs(np.abs(fac(f)) ** 2 / ref - 1.0))
    if not err <= RELATIVE_CHECK:
        raise ValueError(f"spectral factor does not reproduce the spectrum (relative error "
                         f"{err:.2g})")
    return fac
