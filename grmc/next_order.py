"""The next-order (1/volume) correction of the stationary means, and the variance's error.

The continuum mean ``x*`` (the rate equations' steady state) and the linear-noise covariance
``C`` are the first two terms of van Kampen's system-size expansion.  The next term shifts the
mean by ``delta``, of order one count (1/volume relative to the counts):

    J delta = -[ (1/2) sum_r nu_r sum_ij (d^2 a_r / dx_i dx_j) C_ij
                 + sum_r nu_r (a_r^exact(x*) - a_r(x*)) ]                          (1)

with ``a_r`` the macroscopic law of channel r, ``J = sum_r nu_r grad a_r`` the Jacobian of
the rate equations and ``a_r^exact`` the exact propensity (Grima 2010, eq. (9), in counts
rather than concentrations; van Kampen 2007, ch. X).  Read it as: the mean of a curved rate
is not the rate of the mean (the first term: the covariance seen through the curvature of
each law), and a three-body event needs distinct carriers (the second term: the falling
factorial ``N (N - 1)`` against ``N^2``, which gives ``-a/N`` for Auger).  Every channel keeps
the charge, so ``J`` is singular; (1) is solved on the reduced coordinates of
:func:`grmc.continuum.lna` (``x = x* + P y``), so ``delta`` keeps the charge.

Everything is computed from the model's channel tables (coefficients, factors with their
exact and macroscopic offsets, changes): no law is written down here.  A factor ``T_k - M_k``
takes the number of empty traps the continuum solver carries exactly, so a nearly full
level keeps its emission rates.

The variance's error at the same order (:func:`variance_error`) is a proxy, not the derived
term (which needs the third moments of the expansion): the linear-noise variance of each
species times the largest relative next-order correction among the means of the counts it is
coupled to through a channel (the species itself included).  It is zero wherever the laws
are linear, as the exact departure is, and it errs on the safe side where the exact departure
is known: for the reversible pair reaction the exact variance (the Bessel law of Darvey,
Ninham & Staff) departs from the linear-noise ``m/2`` only at the order after this one,
while the proxy gives ``m/2 x 1/(4 m) = 1/8``; in small trap volumes the master equation's
departure stays below the proxy (the tests check both).

References
----------
R. Grima, "An effective rate equation approach to reaction kinetics in small volumes: theory
and application to biochemical reactions in nonequilibrium steady-state conditions",
J. Chem. Phys. 133, 035101 (2010).
N. G. van Kampen, Stochastic Processes in Physics and Chemistry, 3rd ed. (Elsevier, 2007),
ch. X.
R. M. Darvey, B. W. Ninham and P. J. Staff, J. Chem. Phys. 45, 2145 (1966).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import continuum
from .model import MAX_FACTORS, Model

__all__ = ["NextOrder", "mean_correction", "next_order", "variance_error"]


@dataclass(frozen=True)
class NextOrder:
    """The next-order correction about the continuum steady state.

    Attributes
    ----------
    species : tuple of str
    steady : ndarray (S,)  Continuum steady state x* [count]
    delta : ndarray (S,)  Next-order correction of the mean, eq. (1) [count]
    var_lna : ndarray (S,)  Linear-noise variance [count^2]
    var_error : ndarray (S,)  Estimated error of the linear-noise variance at the same order
        (module notes: a proxy) [count^2]
    curvature : ndarray (S,)  The first term of eq. (1)'s bracket [count/s]
    discreteness : ndarray (S,)  The second term (exact minus macroscopic laws) [count/s]
    """

    species: tuple[str, ...]
    steady: np.ndarray
    delta: np.ndarray
    var_lna: np.ndarray
    var_error: np.ndarray
    curvature: np.ndarray
    discreteness: np.ndarray

    @property
    def relative_mean(self) -> np.ndarray:
        """``|delta| / x*`` per species (0 where the species does not move) [1]."""
        return _relative(self.delta, self.steady)

    @property
    def relative_var(self) -> np.ndarray:
        """``var_error / var_lna`` per species (0 where the variance is 0) [1]."""
        return _relative(self.var_error, self.var_lna)


def _relative(err: np.ndarray, ref: np.ndarray) -> np.ndarray:
    ref = np.abs(ref)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(ref > 0, np.abs(err) / ref, np.where(err == 0, 0.0, np.inf))
    return out


def factor_values(model: Model, x: np.ndarray, empty: np.ndarray) -> np.ndarray:
    """Each factor ``sign x[s] + offset`` of the macroscopic laws, shape (channels, 3) [count].

    Unused factors are 1.  A factor ``T_k - M_k`` (sign -1, offset ``T_k``) takes ``empty``.
    """
    fs = np.asarray(model.factor_species)
    used = fs >= 0
    sp_ = np.maximum(fs, 0)
    sign = np.asarray(model.factor_sign)
    off = np.asarray(model.factor_offset_macro)
    cap = np.asarray(model.capacity, dtype=np.float64)[sp_]
    comp = used & (sign < 0) & (cap > 0) & (off == cap)
    vals = np.where(used, sign * np.asarray(x, dtype=np.float64)[sp_] + off, 1.0)
    return np.where(comp, np.asarray(empty, dtype=np.float64)[sp_], vals)


def curvature_contraction(model: Model, values: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """``sum_ij (d^2 a_r / dx_i dx_j) C_ij`` of each channel's macroscopic law [events/s].

    For ``a = k prod_f v_f`` with ``v_f = s_f x[i_f] + o_f`` the second derivatives are
    ``k s_f s_g prod_{h != f, g} v_h`` for each ordered pair of distinct factors ``f != g``.
    """
    fs = np.asarray(model.factor_species)
    sign = np.asarray(model.factor_sign)
    k = np.asarray(model.coefficient)
    out = np.zeros(model.n_channels)
    for f in range(MAX_FACTORS):
        for g in range(MAX_FACTORS):
            if f == g:
                continue
            both = (fs[:, f] >= 0) & (fs[:, g] >= 0)
            if not np.any(both):
                continue
            rest = np.prod(np.delete(values, [f, g], axis=1), axis=1)
            c = cov[np.maximum(fs[:, f], 0), np.maximum(fs[:, g], 0)]
            out += np.where(both, k * sign[:, f] * sign[:, g] * rest * c, 0.0)
    return out


def discreteness_difference(model: Model, values: np.ndarray) -> np.ndarray:
    """``a_r^exact(x*) - a_r(x*)`` of each channel [events/s]: zero where the offsets agree."""
    shift = np.where(np.asarray(model.factor_species) >= 0,
                     np.asarray(model.factor_offset_exact) - np.asarray(model.factor_offset_macro),
                     0.0)
    k = np.asarray(model.coefficient)
    return k * (np.prod(values + shift, axis=1) - np.prod(values, axis=1))


def next_order(model: Model) -> NextOrder:
    """Next-order correction of the mean and the variance's error estimate.

    Parameters
    ----------
    model : Model

    Returns
    -------
    NextOrder

    Raises
    ------
    grmc.continuum.ContinuumError
        Where the continuum steady state or the linear-noise covariance does not exist.

    Notes
    -----
    Eq. (1) of the module notes (Grima 2010), solved on the charge-reduced system
    ``A_r delta_y = -b[independent]`` with ``A_r`` the reduced Jacobian of
    :func:`grmc.continuum.lna` and mapped back, ``delta = P delta_y``.

    References
    ----------
    R. Grima, J. Chem. Phys. 133, 035101 (2010).
    """
    x, empty = continuum.steady_state(model, with_empty=True)
    lna = continuum.lna(model)
    cov = np.asarray(lna.covariance)
    values = factor_values(model, x, empty)
    nu = np.asarray(model.stoich, dtype=np.float64)
    curv = 0.5 * (curvature_contraction(model, values, cov) @ nu)
    disc = discreteness_difference(model, values) @ nu
    b = curv + disc
    ind, proj = np.asarray(lna.independent), np.asarray(lna.projection)
    delta = np.zeros(model.n_species)
    if ind.size:
        delta = proj @ np.linalg.solve(np.asarray(lna.reduced_jacobian), -b[ind])
    var = np.diag(cov).copy()
    return NextOrder(
        species=tuple(model.species), steady=np.asarray(x, dtype=np.float64), delta=delta,
        var_lna=var, var_error=_variance_proxy(model, x, delta, var), curvature=curv,
        discreteness=disc)


def _variance_proxy(model: Model, x: np.ndarray, delta: np.ndarray,
                    var: np.ndarray) -> np.ndarray:
    """``var_s`` times the largest ``|delta_q| / x_q`` over the species q coupled to s.

    Two species are coupled when one channel's law reads one of them and changes the other
    (or reads or changes both).
    """
    rel = _relative(delta, x)
    rel = np.where(np.isfinite(rel), rel, 0.0)
    n_s = model.n_species
    touch = np.zeros((model.n_channels, n_s), dtype=bool)
    touch |= np.asarray(model.stoich) != 0
    fs = np.asarray(model.factor_species)
    for f in range(MAX_FACTORS):
        rows = np.flatnonzero(fs[:, f] >= 0)
        touch[rows, fs[rows, f]] = True
    coupled = (touch.T.astype(int) @ touch.astype(int)) > 0
    coupled |= np.eye(n_s, dtype=bool)
    worst = np.array([rel[coupled[s]].max() for s in range(n_s)])
    return var * worst


def mean_correction(model: Model) -> np.ndarray:
    """Predicted exact stationary mean minus the continuum mean, per species [count].

    The next-order term of the system-size expansion, eq. (1) of the module notes
    (Grima, J. Chem. Phys. 133, 035101, 2010).

    Parameters
    ----------
    model : Model

    Returns
    -------
    ndarray, shape (species,) [count]
    """
    return next_order(model).delta


def variance_error(model: Model) -> np.ndarray:
    """Estimated error of the linear-noise variances at the next order, per species [count^2].

    A proxy (module notes), not the derived next-order term of the covariance.
    """
    return next_order(model).var_error
