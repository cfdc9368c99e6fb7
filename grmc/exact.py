"""Exact master equation of a small volume on a truncated state space.

The chemical master equation of a :class:`~grmc.model.Model` is solved without sampling:
stationary law, moments, count spectra (by the resolvent) and transients (by the action of
the matrix exponential), on a finite state projection (FSP) of the state space whose size is
chosen automatically until the probability outside it is below a tolerance.

State space
-----------
A state is ``x = (N_e, N_h, M_1, ..., M_K)``.  Every channel keeps the charge
``N_e - N_h + sum_k M_k = Q`` (see :mod:`grmc.model`), so for a trap configuration
``M = (M_1, ..., M_K)`` with ``0 <= M_k <= T_k`` the carriers are fixed by one integer, the
number of minority carriers ``j = min(N_e, N_h)``:

    N_e = L(M) + j,   N_h = N_e + sum_k M_k - Q,   L(M) = max(0, Q - sum_k M_k)

(both counts are >= 0 and one of them equals ``j``).  The truncation keeps every trap
configuration and ``0 <= j <= J``: ``prod_k (T_k + 1) * (J + 1)`` states, no state with a
negative count, every state of the right charge.  This bounds both ``N_e <= n_max`` and
``N_h <= n_max_h`` (``n_max = J + max_M L(M)``), with no room wasted on the majority carrier
whose count is pinned by the charge.  Each event changes ``j`` by at most one.

Truncation and its error
------------------------
Two generators are built from the model's exact propensities (never re-deriving a channel
law: :meth:`Model.propensities` on the stacked states and :attr:`Model.stoich`):

* *reflecting*: transitions that would leave the truncation are dropped.  Its stationary law
  is the stationary law used here.  For a reversible chain (every dark scenario: detailed
  balance) it equals the exact law conditioned on the truncation (Kelly 1979, section 1.6);
  in general it converges to the exact law as ``J`` grows (Gupta, Mikelson & Khammash 2017).
* *absorbing*: transitions leaving the truncation go to a sink, as in the original FSP
  (Munsky & Khammash 2006).  Its transient ``p_J(t)`` is a lower bound of the exact one and
  ``1 - sum p_J(t)`` bounds the L1 error of the transient at every earlier time (their
  finite-state-projection theorem).

``mass_outside`` estimates the stationary probability beyond ``j = J`` by extrapolating the
decay of the marginal law of ``j`` at the top of the truncation (the geometric tail
``P_J r / (1 - r)``, ``r = P_J / P_{J-1}``); ``J`` is doubled until it is below ``tol`` (and,
for transients, until the absorbed mass is below ``tol`` at the last time), then cut back to
the levels the tolerance needs with a factor 100 of margin (stationary probability above the
cut, and, for transients, the stationary flux through the cut times the last time).

Spectra
-------
For a stationary chain with generator ``Q`` (``Q_ij`` the rate i -> j, rows summing to 0)
and stationary law ``pi``, the covariance of two observables ``y^a``, ``y^b`` (centred) is

    C_ab(tau) = E[y^a(t) y^b(t + tau)] = sum_ij pi_i y^a_i [exp(Q tau)]_ij y^b_j,  tau >= 0,

and its one-sided Laplace-Fourier transform is a resolvent:

    F_ab(w) = int_0^inf C_ab(tau) exp(-i w tau) dtau = (pi o y^a)^T (i w I - Q)^-1 y^b.

The one-sided (cross) spectral density, in the convention of the linear-noise spectral matrix
``2 (i w - A)^-1 D (-i w - A^T)^-1`` (docs/physics.md), is

    S_ab(f) = 2 int_-inf^inf E[y^a(t + tau) y^b(t)] exp(-i w tau) dtau
            = 2 [F_ba(w) + conj(F_ab(w))],         w = 2 pi f,

so that ``S_aa(f) = 4 Re F_aa(w) = 4 int_0^inf C_aa(tau) cos(w tau) dtau`` and
``S_ba = conj(S_ab)``; ``int_0^inf S_aa(f) df = var(y^a)`` (Parseval / Wiener-Khinchin).
``i w I - Q`` is regular for every ``w > 0`` (Gershgorin: the only eigenvalue of a finite
generator on the imaginary axis is 0), so one sparse LU per frequency gives all ``S_ab``.

Collected flux
--------------
Channels with a ``flow`` weight (a carrier crossing the collecting boundary, +1 out, -1 in)
make the flux ``J(t) = sum_r flow_r dN_r/dt``, a sum of unit jumps.  With ``K_ik`` the
flow-weighted rate of the transitions i -> k (``K2`` with ``flow^2``), ``v = K 1`` the mean
flux out of each state and ``u = K^T pi`` the law just after a flow-weighted jump,

    E[J(t + tau) J(t)] = pi^T K2 1 delta(tau) + u^T exp(Q tau) v,   tau > 0,

so the one-sided spectrum is ``S_J(f) = 2 [pi^T K2 1 + 2 Re u^T (i w I - Q)^-1 (v - Jbar 1)]``:
the shot term of every crossing plus its correlation with the later ones (the counting
statistics of a Markov jump process; e.g. Cox & Lewis, The Statistical Analysis of Series of
Events, Methuen 1966, from memory).

References
----------
B. Munsky and M. Khammash, "The finite state projection algorithm for the solution of the
chemical master equation", J. Chem. Phys. 124, 044104 (2006).
A. Gupta, J. Mikelson and M. Khammash, "A finite state projection algorithm for the
stationary solution of the chemical master equation", J. Chem. Phys. 147, 154101 (2017)
(from memory).
F. P. Kelly, Reversibility and Stochastic Networks (Wiley, 1979), section 1.6: truncation of a
reversible process (from memory).
A. H. Al-Mohy and N. J. Higham, "Computing the action of the matrix exponential, with an
application to exponential integrators", SIAM J. Sci. Comput. 33, 488 (2011) (the algorithm
of :func:`scipy.sparse.linalg.expm_multiply`).
W. J. Stewart, Introduction to the Numerical Solution of Markov Chains (Princeton, 1994),
chapter 2: direct solution of ``pi Q = 0`` with one component fixed (from memory).
R. M. Darvey, B. W. Ninham and P. J. Staff, "Stochastic models for second-order chemical
reaction kinetics. The equilibrium state", J. Chem. Phys. 45, 2145 (1966).
S. Machlup, "Noise in semiconductors: spectrum of a two-parameter random signal",
J. Appl. Phys. 25, 341 (1954).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy import special
from scipy.sparse import csgraph

from .model import Model

__all__ = [
    "DEFAULT_MAX_STATES",
    "ExactResult",
    "StateSpace",
    "StateSpaceTooLarge",
    "TruncationWarning",
    "generator",
    "pair_reaction_exact",
    "pair_reaction_law",
    "solve",
    "spectral_matrix",
    "state_space",
    "stationary_law",
    "telegraph_psd",
    "transient",
]

#: Default largest state space :func:`solve` builds [states].
DEFAULT_MAX_STATES = 2_000_000

#: Smallest truncation ``J`` (largest minority count kept) tried first.
_FIRST_J = 15

#: Largest accepted relative residual ``||Q^T pi||_1 / sum_i pi_i |Q_ii|`` of the stationary law.
_RESIDUAL_TOL = 1e-10

#: Largest chain whose transient may use dense propagators [states].
_DENSE_MAX = 1000

#: Fill-reducing ordering of the sparse LU: minimum degree on the pattern of A^T + A, which
#: suits generators (every channel but optical generation has its reverse, so the pattern is
#: nearly symmetric); measured 3x less time than COLAMD on a 1000 x 1000 state grid.
_ORDERING = "MMD_AT_PLUS_A"

#: L1 distance to the stationary law below which a transient is taken as relaxed.
_STATIONARY_L1 = 1e-12

#: Largest run of equal time steps handed to one expm_multiply call.
_BLOCK = 16

#: States per chunk when evaluating propensities (bounds the temporary memory).
_CHUNK = 1 << 18


class StateSpaceTooLarge(ValueError):
    """The truncation that the requested accuracy needs exceeds ``max_states``.

    Attributes
    ----------
    needed : int  Estimated states of an adequate truncation [states]
    max_states : int  The limit that was given [states]
    lower_bound : bool  True when ``needed`` is only a lower bound
    """

    def __init__(self, needed: int, max_states: int, detail: str = "", *, lower_bound=False):
        self.needed = int(needed)
        self.max_states = int(max_states)
        self.lower_bound = bool(lower_bound)
        more = "more than " if lower_bound else "about "
        msg = (
            f"the exact master equation would need {more}{self.needed:,} states "
            f"(max_states = {self.max_states:,}){': ' + detail if detail else ''}. "
            "Use the Monte Carlo ensemble (`grmc run`) for this volume, or raise max_states."
        )
        super().__init__(msg)


class TruncationWarning(UserWarning):
    """A fixed truncation (``max_pairs`` given) leaves more probability outside than ``tol``."""


# --------------------------------------------------------------------------------------------
# State space
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class StateSpace:
    """All states of one charge with ``0 <= M_k <= T_k`` and minority count ``j <= J``.

    Attributes
    ----------
    states : ndarray of int64, shape (n, S)  Counts ``(N_e, N_h, M_1..M_K)`` [count]
    max_pairs : int  J, the largest minority count ``min(N_e, N_h)`` kept [count]
    capacity : tuple of int  T_k of each trap level [count]
    charge : int  The conserved ``N_e - N_h + sum M_k`` [elementary charges]

    Notes
    -----
    State ``i`` is trap configuration ``i // (J + 1)`` (mixed radix over the levels, the last
    level fastest) with minority count ``j = i % (J + 1)``.
    """

    states: np.ndarray
    max_pairs: int
    capacity: tuple[int, ...]
    charge: int

    @property
    def n_states(self) -> int:
        """Number of states [states]."""
        return int(self.states.shape[0])

    @property
    def minority(self) -> np.ndarray:
        """``j = min(N_e, N_h)`` of every state, shape (n,) [count]."""
        return np.minimum(self.states[:, 0], self.states[:, 1])

    def index(self, x: np.ndarray) -> np.ndarray:
        """Index of each state in ``x`` (shape (..., S)); -1 where it is outside or invalid.

        Parameters
        ----------
        x : array_like of int, shape (..., S)  Counts [count]

        Returns
        -------
        ndarray of int64, shape (...)
        """
        x = np.asarray(x, dtype=np.int64)
        return _index(x, self.capacity, self.charge, self.max_pairs)


def _strides(capacity: tuple[int, ...]) -> np.ndarray:
    sizes = np.asarray(capacity, dtype=np.int64) + 1
    strides = np.ones(len(capacity), dtype=np.int64)
    for k in range(len(capacity) - 2, -1, -1):
        strides[k] = strides[k + 1] * sizes[k + 1]
    return strides


def _n_configs(capacity: tuple[int, ...]) -> int:
    return int(np.prod(np.asarray(capacity, dtype=np.float64) + 1.0)) if capacity else 1


def _index(x: np.ndarray, capacity: tuple[int, ...], charge: int, J: int) -> np.ndarray:
    ne, nh, m = x[..., 0], x[..., 1], x[..., 2:]
    cap = np.asarray(capacity, dtype=np.int64)
    ok = (ne >= 0) & (nh >= 0) & np.all((m >= 0) & (m <= cap), axis=-1)
    ok &= ne - nh + m.sum(axis=-1) == charge
    j = np.minimum(ne, nh)
    ok &= j <= J
    cfg = (m * _strides(capacity)).sum(axis=-1) if len(capacity) else np.zeros_like(ne)
    return np.where(ok, cfg * (J + 1) + j, -1)


def state_space(model: Model, max_pairs: int) -> StateSpace:
    """Enumerate the truncated state space of a model.

    Parameters
    ----------
    model : Model
    max_pairs : int
        J, the largest minority-carrier count ``min(N_e, N_h)`` kept [count].

    Returns
    -------
    StateSpace
        ``prod_k (T_k + 1) * (J + 1)`` states, each of the model's charge.
    """
    J = int(max_pairs)
    if J < 0:
        raise ValueError(f"max_pairs must be >= 0, got {max_pairs}")
    capacity = tuple(int(c) for c in model.capacity[2:])
    n_cfg = _n_configs(capacity)
    S = model.n_species
    idx = np.arange(n_cfg * (J + 1), dtype=np.int64)
    cfg, j = np.divmod(idx, J + 1)
    states = np.empty((idx.size, S), dtype=np.int64)
    if capacity:
        m = np.stack(np.unravel_index(cfg, tuple(c + 1 for c in capacity)), axis=-1)
        states[:, 2:] = m
        msum = m.sum(axis=1)
    else:
        msum = np.zeros_like(idx)
    low = np.maximum(0, model.charge - msum)
    states[:, 0] = low + j
    states[:, 1] = states[:, 0] + msum - model.charge
    states.setflags(write=False)
    return StateSpace(states=states, max_pairs=J, capacity=capacity, charge=int(model.charge))


# --------------------------------------------------------------------------------------------
# Generator
# --------------------------------------------------------------------------------------------


def generator(
    model: Model,
    space: StateSpace,
    *,
    boundary: Literal["reflecting", "absorbing"] = "reflecting",
) -> tuple[sp.csr_matrix, np.ndarray]:
    """Generator of the master equation on a truncated state space.

    Parameters
    ----------
    model : Model
        Its exact propensities and stoichiometry are the only physics used.
    space : StateSpace
    boundary : {"reflecting", "absorbing"}
        ``"reflecting"``: transitions leaving the truncation are dropped (rows sum to 0).
        ``"absorbing"``: they go to a sink (the FSP generator; rows sum to ``-outflow``).

    Returns
    -------
    Q : scipy.sparse.csr_matrix, shape (n, n)
        ``Q[i, k]`` rate of the transition i -> k (i != k), ``Q[i, i]`` minus the exit
        rate [s^-1].  ``d p / dt = Q^T p`` for a column of probabilities ``p``.
    outflow : ndarray, shape (n,)
        Rate at which each state leaves the truncation [s^-1].

    Notes
    -----
    Vectorised over states: ``model.propensities`` on the stacked states (in chunks), then one
    target index per group of channels sharing a stoichiometric vector.
    """
    if boundary not in ("reflecting", "absorbing"):
        raise ValueError(f"boundary must be 'reflecting' or 'absorbing', got {boundary!r}")
    X = space.states
    n = space.n_states
    nu = np.asarray(model.stoich, dtype=np.int64)
    if nu.shape[0] == 0:
        return sp.csr_matrix((n, n)), np.zeros(n)
    groups, inverse = np.unique(nu, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    G = groups.shape[0]
    itype = np.int32 if n < np.iinfo(np.int32).max else np.int64
    rows_l, cols_l, vals_l = [], [], []
    exit_rate = np.zeros(n)
    outflow = np.zeros(n)
    for start in range(0, n, _CHUNK):
        stop = min(n, start + _CHUNK)
        xs = X[start:stop]
        a = model.propensities(xs)  # (m, C) [events/s]
        # Sum channels with the same change (e.g. thermal, optical, impact generation).
        ag = np.zeros((stop - start, G))
        for g in range(G):
            ag[:, g] = a[:, inverse == g].sum(axis=1)
        for g in range(G):
            rate = ag[:, g]
            live = rate > 0.0
            if not np.any(live):
                continue
            src = np.nonzero(live)[0]
            tgt = space.index(xs[src] + groups[g])
            inside = tgt >= 0
            rows_l.append((src[inside] + start).astype(itype))
            cols_l.append(tgt[inside].astype(itype))
            vals_l.append(rate[src[inside]])
            exit_rate[start + src[inside]] += rate[src[inside]]
            np.add.at(outflow, start + src[~inside], rate[src[~inside]])
    diag = exit_rate + (outflow if boundary == "absorbing" else 0.0)
    rows = np.concatenate(rows_l + [np.arange(n, dtype=itype)])
    cols = np.concatenate(cols_l + [np.arange(n, dtype=itype)])
    vals = np.concatenate(vals_l + [-diag])
    Q = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    Q.sum_duplicates()
    return Q, outflow


# --------------------------------------------------------------------------------------------
# Stationary law
# --------------------------------------------------------------------------------------------


def _pinned_solve(Q: sp.csr_matrix, k: int) -> np.ndarray:
    """Solve pi^T Q = 0 with pi_k = 1 (drop equation k, move column k to the right side)."""
    n = Q.shape[0]
    if n == 1:
        return np.ones(1)
    keep = np.ones(n, dtype=bool)
    keep[k] = False
    QT = Q.T.tocsr()  # rows: balance equations
    A = QT[keep][:, keep].tocsc()
    b = -QT[keep][:, [k]].toarray().ravel()
    lu = spla.splu(A, permc_spec=_ORDERING)
    x = lu.solve(b)
    # One step of iterative refinement.
    r = b - A @ x
    x = x + lu.solve(r)
    pi = np.empty(n)
    pi[keep] = x
    pi[k] = 1.0
    return pi


def _relative_residual(Q: sp.csr_matrix, pi: np.ndarray) -> float:
    flux = float(np.abs(Q.diagonal()) @ np.abs(pi))
    if flux == 0.0:
        return 0.0
    return float(np.abs(Q.T @ pi).sum() / flux)


def stationary_law(Q: sp.csr_matrix, *, pin: int | None = None) -> tuple[np.ndarray, float]:
    """Stationary law of an irreducible conservative generator.

    Parameters
    ----------
    Q : scipy.sparse matrix, shape (n, n)
        Generator with rows summing to 0 [s^-1], irreducible.
    pin : int, optional
        A state expected to be likely; fixed to 1 before normalising.  Default (and next
        tries when a pin is so unlikely that the solve overflows): the states with the
        smallest and the largest exit rate, the middle, first and last state.  The solve is
        repeated pinned at the most probable state when the pin turns out unlikely.

    Returns
    -------
    pi : ndarray, shape (n,)
        Stationary probabilities (sum 1, >= 0).
    residual : float
        ``||Q^T pi||_1 / sum_i pi_i |Q_ii|``, the balance residual relative to the total flux.

    Raises
    ------
    RuntimeError
        When neither the direct solve nor the eigenvalue fallback reaches a relative residual
        of 1e-10.

    Notes
    -----
    Direct sparse LU of ``Q^T`` with the equation of state ``k`` replaced by ``pi_k = 1``
    (Stewart 1994, chapter 2), one step of iterative refinement; fallback:
    :func:`scipy.sparse.linalg.eigs` in shift-invert mode about a small negative shift.
    """
    Q = sp.csr_matrix(Q)
    n = Q.shape[0]
    exit_rate = -Q.diagonal()
    candidates = [] if pin is None else [int(pin)]
    candidates += [int(np.argmin(exit_rate)), int(np.argmax(exit_rate)), n // 2, 0, n - 1]
    pi = None
    for k in dict.fromkeys(candidates):  # unique, in order
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error", spla.MatrixRankWarning)
                trial = _pinned_solve(Q, k)
                if not np.all(np.isfinite(trial)):
                    continue  # pinned at a state so unlikely that the others overflow
                best = int(np.argmax(trial))
                if trial[best] > 1e3 * abs(trial[k]) or trial[k] <= 0:
                    trial = _pinned_solve(Q, best)
        except (RuntimeError, spla.MatrixRankWarning):
            continue
        if np.all(np.isfinite(trial)):
            pi = trial
            break
    if pi is not None:
        scale = pi.max()
        if scale > 0 and pi.min() > -1e-12 * scale:
            pi = np.clip(pi, 0.0, None)
            pi /= pi.sum()
            res = _relative_residual(Q, pi)
            if res <= _RESIDUAL_TOL:
                return pi, res
    # Fallback: eigenvector of Q^T nearest the eigenvalue 0.
    shift = -1e-9 * max(float(np.abs(Q.diagonal()).max()), 1e-300)
    try:
        _, vecs = spla.eigs(Q.T.tocsc(), k=1, sigma=shift, which="LM")
    except (RuntimeError, spla.ArpackError) as exc:
        raise RuntimeError(
            f"stationary law not found: direct solve and eigs failed ({exc})") from exc
    v = np.real(vecs[:, 0])
    v = v * np.sign(v.sum())
    v = np.clip(v, 0.0, None)
    pi = v / v.sum()
    res = _relative_residual(Q, pi)
    if res > _RESIDUAL_TOL:
        raise RuntimeError(
            f"stationary law not found to a relative residual of {_RESIDUAL_TOL:g} "
            f"(best {res:.3g}); the chain may be reducible or too stiff"
        )
    return pi, res


def _stationary_class(Q: sp.csr_matrix, start: int | None) -> np.ndarray:
    """Indices of the closed communicating class that carries the stationary law.

    The whole space when the chain is irreducible; otherwise the unique closed class
    reachable from ``start``.
    """
    n = Q.shape[0]
    off = Q - sp.diags(Q.diagonal())
    off.eliminate_zeros()
    n_comp, labels = csgraph.connected_components(off, directed=True, connection="strong")
    if n_comp == 1:
        return np.arange(n)
    coo = off.tocoo()
    leaves = labels[coo.row] != labels[coo.col]
    open_class = np.zeros(n_comp, dtype=bool)
    open_class[labels[coo.row[leaves]]] = True
    closed = np.nonzero(~open_class)[0]
    if closed.size == 1:
        return np.nonzero(labels == closed[0])[0]
    if start is None:
        raise ValueError(
            f"the truncated chain has {closed.size} closed classes (some event channels are "
            "absent, so not every state is reachable): give x0 to select the one reached "
            "from the start state"
        )
    reach = csgraph.breadth_first_order(off, start, directed=True, return_predecessors=False)
    reached = np.unique(labels[reach])
    reached_closed = reached[~open_class[reached]]
    if reached_closed.size != 1:
        raise ValueError(
            f"{reached_closed.size} closed classes are reachable from x0: the stationary law "
            "depends on the path taken, so it is not defined by the start state alone"
        )
    return np.nonzero(labels == reached_closed[0])[0]


def _tail_estimate(p_j: np.ndarray) -> float:
    """Probability beyond the last level from the decay of the last two levels (geometric)."""
    if p_j.size < 2:
        return float(p_j[-1]) if p_j.size else 0.0
    last, prev = float(p_j[-1]), float(p_j[-2])
    if last <= 0.0:
        return 0.0
    if prev <= 0.0 or last >= prev:
        return math.inf
    r = last / prev
    return last * r / (1.0 - r)


# --------------------------------------------------------------------------------------------
# Spectra
# --------------------------------------------------------------------------------------------


def spectral_matrix(
    Q: sp.spmatrix,
    probability: np.ndarray,
    observables: np.ndarray,
    freqs: np.ndarray,
) -> np.ndarray:
    """One-sided (cross) spectral densities of observables of a stationary Markov chain.

    Parameters
    ----------
    Q : scipy.sparse matrix, shape (n, n)
        Conservative generator [s^-1] (rows sum to 0) on a closed set of states.
    probability : ndarray, shape (n,)
        Its stationary law.
    observables : ndarray, shape (n, K)
        Value of each observable in each state [unit u].
    freqs : array_like, shape (F,)
        Frequencies f > 0 [Hz].

    Returns
    -------
    ndarray of complex, shape (K, K, F)
        ``S_ab(f) = 2 int E[dy_a(t + tau) dy_b(t)] exp(-2 pi i f tau) dtau`` [u^2/Hz];
        ``S_aa`` is real (the one-sided PSD), ``S_ba = conj(S_ab)``.

    Notes
    -----
    ``S_ab = 2 [F_ba + conj(F_ab)]`` with ``F_ab(w) = (pi o y_a)^T (i w I - Q)^-1 y_b``
    (module notes): one sparse LU of ``i w I - Q`` per frequency, K solves each.
    """
    Q = sp.csc_matrix(Q)
    n = Q.shape[0]
    pi = np.asarray(probability, dtype=np.float64)
    Y = np.asarray(observables, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    Y = Y - pi @ Y  # centre
    freqs = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
    if np.any(~np.isfinite(freqs)) or np.any(freqs <= 0):
        raise ValueError("frequencies must be finite and > 0 [Hz]")
    K = Y.shape[1]
    W = pi[:, None] * Y
    out = np.empty((K, K, freqs.size), dtype=np.complex128)
    eye = sp.identity(n, dtype=np.complex128, format="csc")
    Qc = Q.astype(np.complex128)
    for i, f in enumerate(freqs):
        w = 2.0 * math.pi * f
        lu = spla.splu((1j * w) * eye - Qc, permc_spec=_ORDERING)
        U = lu.solve(Y.astype(np.complex128))  # (n, K): (i w I - Q)^-1 y_b
        F = W.T @ U  # F[a, b]
        out[:, :, i] = 2.0 * (F.T + np.conj(F))
    for a in range(K):
        out[a, a, :] = out[a, a, :].real
    return out


def flux_matrices(model: Model, space: StateSpace,
                  support: np.ndarray) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """Flow-weighted transition rates ``K`` and ``K2`` (weights ``flow_r``, ``flow_r^2``).

    Parameters
    ----------
    model : Model
    space : StateSpace
    support : ndarray of int64  Indices in ``space`` of a closed class of states

    Returns
    -------
    K, K2 : scipy.sparse.csr_matrix, shape (m, m), m = len(support)
        ``K[i, k] = sum_r flow_r a_r(i)`` over the channels taking support state i to
        support state k [s^-1] (a channel that changes no count gives ``K[i, i]``);
        transitions leaving the class are dropped, as in the reflecting generator.
    """
    flow = np.asarray(model.flow_weight, dtype=np.float64)
    m = support.size
    pos = np.full(space.n_states, -1, dtype=np.int64)
    pos[support] = np.arange(m)
    states = space.states[support]
    a = model.propensities(states)
    nu = np.asarray(model.stoich, dtype=np.int64)
    rows_l, cols_l, v1, v2 = [], [], [], []
    for r in np.flatnonzero(flow):
        live = np.flatnonzero(a[:, r] > 0.0)
        tgt = space.index(states[live] + nu[r])
        tgt = np.where(tgt >= 0, pos[np.maximum(tgt, 0)], -1)
        hit = tgt >= 0
        rows_l.append(live[hit])
        cols_l.append(tgt[hit])
        v1.append(flow[r] * a[live[hit], r])
        v2.append(flow[r] ** 2 * a[live[hit], r])
    if not rows_l:
        empty = sp.csr_matrix((m, m))
        return empty, empty
    rows, cols = np.concatenate(rows_l), np.concatenate(cols_l)
    K = sp.csr_matrix((np.concatenate(v1), (rows, cols)), shape=(m, m))
    K2 = sp.csr_matrix((np.concatenate(v2), (rows, cols)), shape=(m, m))
    return K, K2


def flux_spectrum(Q: sp.spmatrix, probability: np.ndarray, K: sp.spmatrix, K2: sp.spmatrix,
                  freqs: np.ndarray) -> tuple[float, np.ndarray]:
    """Mean and one-sided spectrum of a collected flux of a stationary Markov chain.

    Parameters
    ----------
    Q : scipy.sparse matrix, shape (n, n)  Conservative generator on a closed class [s^-1]
    probability : ndarray, shape (n,)  Its stationary law
    K, K2 : scipy.sparse matrix, shape (n, n)  :func:`flux_matrices` on the same states
    freqs : array_like, shape (F,)  Frequencies > 0 [Hz]

    Returns
    -------
    mean : float  ``pi^T K 1`` [carriers/s]
    psd : ndarray, shape (F,)  ``2 [pi^T K2 1 + 2 Re u^T (i w I - Q)^-1 (v - mean)]`` [s^-1]
        (module notes)
    """
    Q = sp.csc_matrix(Q)
    n = Q.shape[0]
    pi = np.asarray(probability, dtype=np.float64)
    v = np.asarray(K.sum(axis=1)).ravel()
    mean = float(pi @ v)
    white = float(pi @ np.asarray(K2.sum(axis=1)).ravel())
    u = np.asarray(K.T @ pi).ravel()
    vc = (v - mean).astype(np.complex128)
    freqs = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
    if np.any(~np.isfinite(freqs)) or np.any(freqs <= 0):
        raise ValueError("frequencies must be finite and > 0 [Hz]")
    eye = sp.identity(n, dtype=np.complex128, format="csc")
    Qc = Q.astype(np.complex128)
    out = np.empty(freqs.size)
    for i, f in enumerate(freqs):
        lu = spla.splu((2j * math.pi * f) * eye - Qc, permc_spec=_ORDERING)
        out[i] = 2.0 * (white + 2.0 * float(np.real(u @ lu.solve(vc))))
    return mean, out


# --------------------------------------------------------------------------------------------
# Transient
# --------------------------------------------------------------------------------------------


def transient(
    Q_absorbing: sp.spmatrix,
    p0: np.ndarray,
    times: np.ndarray,
    *,
    method: Literal["auto", "sparse", "dense"] = "auto",
    stationary: np.ndarray | None = None,
) -> np.ndarray:
    """Probability vectors ``p(t) = exp(Q^T t) p0`` at the given times.

    Parameters
    ----------
    Q_absorbing : scipy.sparse matrix, shape (n, n)
        FSP generator [s^-1] (outflow to the sink on the diagonal).
    p0 : ndarray, shape (n,)
        Start distribution.
    times : array_like, shape (T,)
        Times >= 0, any order [s].
    method : {"auto", "sparse", "dense"}
        ``"sparse"``: :func:`scipy.sparse.linalg.expm_multiply`; ``"dense"``: propagators by
        :func:`scipy.linalg.expm`; ``"auto"``: dense for stiff chains of at most 1000 states
        (see Notes).
    stationary : ndarray, shape (n,), optional
        The stationary law of the reflecting generator.  Once the normalised ``p(t)`` is
        within 1e-12 of it (L1), later times take it, scaled by the probability retained at
        that moment, instead of being computed.

    Returns
    -------
    ndarray, shape (T, n)
        ``p_J(t)``; ``1 - p_J(t).sum()`` is the probability absorbed (the FSP error bound;
        after the stationary shortcut, the absorbed probability when it was taken).

    Notes
    -----
    :func:`scipy.sparse.linalg.expm_multiply` (Al-Mohy & Higham 2011), from one sorted time to
    the next, runs of equal steps (a uniform grid) in one call each of at most 16 points;
    its cost grows with ``||Q||_1 t``, the number of the fastest events in the window.  For
    stiff small chains (at most 1000 states) whose sparse cost would exceed a dense one, the
    propagator ``exp(Q^T dt)`` of each distinct step is formed once by
    :func:`scipy.linalg.expm` (scaling and squaring) and applied by products.
    The stationary shortcut holds to its threshold because a Markov semigroup is a
    contraction in L1: ``||p(t') - pi||_1 <= ||p(t) - pi||_1`` for ``t' > t``.  After it, the
    error of the law is bounded by the probability absorbed until then plus that of the
    stationary law (its ``mass_outside``), instead of growing with the stationary outflow
    of the absorbing truncation, which is an artefact of the sink.
    """
    times = np.atleast_1d(np.asarray(times, dtype=np.float64))
    if np.any(~np.isfinite(times)) or np.any(times < 0):
        raise ValueError("times must be finite and >= 0 [s]")
    if method not in ("auto", "sparse", "dense"):
        raise ValueError(f"method must be 'auto', 'sparse' or 'dense', got {method!r}")
    A = sp.csr_matrix(Q_absorbing).T.tocsr()
    n = A.shape[0]
    order = np.argsort(times, kind="stable")
    ts = times[order]
    steps = np.diff(np.concatenate([[0.0], ts]))
    # Steps equal to 1e-12 relative (a uniform grid after rounding) share one propagator.
    key = np.zeros(steps.size)
    positive = steps > 0
    key[positive] = np.exp(np.round(np.log(steps[positive]) * 1e12) / 1e12)
    n_distinct = np.unique(key[positive]).size
    norm = float(abs(A).sum(axis=0).max()) if n else 0.0
    sparse_cost = norm * float(steps.sum()) * max(A.nnz, 1)
    dense = method == "dense" or (
        method == "auto" and n <= _DENSE_MAX and sparse_cost > n_distinct * float(n) ** 3)
    if stationary is not None:
        stationary = np.asarray(stationary, dtype=np.float64)
    cache: dict[float, np.ndarray] = {}
    out = np.empty((times.size, n))
    p = np.asarray(p0, dtype=np.float64).copy()
    pos = 0
    while pos < ts.size:
        if stationary is not None and pos > 0:
            mass = p.sum()
            if mass > 0 and np.abs(p / mass - stationary).sum() <= _STATIONARY_L1:
                out[order[pos:]] = mass * stationary
                break
        dt = steps[pos]
        if dt == 0.0:
            out[order[pos]] = p
            pos += 1
            continue
        end = pos + 1
        while end < ts.size and key[end] == key[pos] and end - pos < _BLOCK:
            end += 1
        if dense:
            if key[pos] not in cache:
                cache[key[pos]] = scipy.linalg.expm(A.toarray() * dt)
            for q in range(pos, end):
                p = np.clip(cache[key[pos]] @ p, 0.0, None)
                out[order[q]] = p
        elif end - pos == 1:
            p = np.clip(spla.expm_multiply(A * dt, p), 0.0, None)
            out[order[pos]] = p
        else:
            block = spla.expm_multiply(A, p, start=dt, stop=dt * (end - pos),
                                       num=end - pos, endpoint=True)
            block = np.clip(block, 0.0, None)
            out[order[pos:end]] = block
            p = block[-1].copy()
        pos = end
    return out


# --------------------------------------------------------------------------------------------
# Driver
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class ExactResult:
    """Exact solution of the master equation of one model on a truncated state space.

    Attributes
    ----------
    species : tuple of str  Species names, the order of every species axis
    states : ndarray of int64, shape (n, S)  The truncated state space [count]
    probability : ndarray, shape (n,)  Stationary law (0 outside its closed class)
    mean : ndarray, shape (S,)  Stationary mean [count]
    var : ndarray, shape (S,)  Stationary variance [count^2]
    covariance : ndarray, shape (S, S)  Stationary covariance [count^2]
    mass_outside : float  Estimated stationary probability beyond the truncation
    outflow_rate : float  Stationary rate of leaving the truncation, ``sum_i pi_i out_i`` [s^-1]
    n_states : int  Number of states in the truncation [states]
    max_pairs : int  J, the largest minority count ``min(N_e, N_h)`` kept [count]
    residual : float  Relative balance residual of the stationary law
    freqs : ndarray or None, shape (F,)  Frequencies of the spectra [Hz]
    psd : ndarray or None, shape (S, F)  One-sided count PSD [count^2/Hz]
    psd_matrix : ndarray or None, shape (S, S, F)  One-sided cross-spectral matrix
        ``S_ab = 2 int E[dx_a(t + tau) dx_b(t)] exp(-i w tau) dtau`` [count^2/Hz]
    psd_cross_eh : ndarray or None, shape (F,)  ``psd_matrix[0, 1]``, electrons-holes (complex)
        [count^2/Hz]; a readout current ``a N_e + b N_h`` has the PSD
        ``a^2 S_ee + 2 a b Re S_eh + b^2 S_hh``
    times : ndarray or None, shape (T,)  Transient times [s]
    x0 : ndarray or None, shape (S,)  Start state of the transient [count]
    transient_mean : ndarray or None, shape (T, S)  Mean counts at ``times`` [count]
    transient_var : ndarray or None, shape (T, S)  Variances at ``times`` [count^2]
    transient_mass_lost : ndarray or None, shape (T,)  Probability absorbed by the FSP sink
        by each time (bounds the L1 error of the transient law)
    flux_mean : float or None  Mean collected flux ``sum_r flow_r <a_r>`` [carriers/s]
        (None when no channel has a flow)
    flux_white : float or None  Its white (high-frequency) level ``2 sum_r flow_r^2 <a_r>``
        [s^-1]
    flux_psd : ndarray or None, shape (F,)  Its one-sided spectrum [s^-1]
        (:func:`flux_spectrum`); ``q^2`` times it is the current's in A^2/Hz
    """

    species: tuple[str, ...]
    states: np.ndarray
    probability: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    covariance: np.ndarray
    mass_outside: float
    outflow_rate: float
    n_states: int
    max_pairs: int
    residual: float
    freqs: np.ndarray | None = None
    psd: np.ndarray | None = None
    psd_matrix: np.ndarray | None = None
    psd_cross_eh: np.ndarray | None = None
    times: np.ndarray | None = None
    x0: np.ndarray | None = None
    transient_mean: np.ndarray | None = None
    transient_var: np.ndarray | None = None
    transient_mass_lost: np.ndarray | None = None
    flux_mean: float | None = None
    flux_white: float | None = None
    flux_psd: np.ndarray | None = None
    _generator: sp.csr_matrix | None = field(default=None, repr=False)
    _support: np.ndarray | None = field(default=None, repr=False)

    def marginal(self, species: int | str) -> tuple[np.ndarray, np.ndarray]:
        """Stationary law of one species.

        Parameters
        ----------
        species : int or str  Index or name

        Returns
        -------
        values : ndarray of int64  Counts with non-zero probability [count]
        probability : ndarray  Their probabilities
        """
        s = self.species.index(species) if isinstance(species, str) else int(species)
        vals, inv = np.unique(self.states[:, s], return_inverse=True)
        prob = np.bincount(np.asarray(inv).reshape(-1), weights=self.probability,
                           minlength=vals.size)
        return vals, prob

    def spectrum(self, weights: np.ndarray, freqs: np.ndarray) -> np.ndarray:
        """One-sided spectral matrix of linear combinations of the counts.

        Parameters
        ----------
        weights : array_like, shape (K, S) or (S,)
            Observable ``y_a = sum_s weights[a, s] x_s`` [unit u per count].
        freqs : array_like, shape (F,)  Frequencies > 0 [Hz]

        Returns
        -------
        ndarray of complex, shape (K, K, F)  [u^2/Hz], convention of :func:`spectral_matrix`
        """
        W = np.atleast_2d(np.asarray(weights, dtype=np.float64))
        sup = self._support
        Y = self.states[sup].astype(np.float64) @ W.T
        return spectral_matrix(self._generator, self.probability[sup], Y, freqs)


def _moments(states: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    X = states.astype(np.float64)
    mass = p.sum()
    mean = (p @ X) / mass
    D = X - mean
    cov = (D * p[:, None]).T @ D / mass
    return mean, cov


@dataclass(frozen=True, eq=False)
class _Stationary:
    space: StateSpace
    outflow: np.ndarray
    support: np.ndarray
    generator: sp.csr_matrix
    pi_support: np.ndarray
    pi: np.ndarray
    p_j: np.ndarray
    residual: float
    mass_outside: float
    best_state: np.ndarray


def _stationary_at(model: Model, J: int, x0, best_state) -> _Stationary:
    """Stationary law on the truncation J (reflecting boundary) and its tail estimate."""
    space = state_space(model, J)
    Q, outflow = generator(model, space, boundary="reflecting")
    start_idx = None if x0 is None else int(space.index(x0))
    if start_idx is not None and start_idx < 0:
        start_idx = None
    sup = _stationary_class(Q, start_idx)
    Qs = Q[sup][:, sup].tocsr()  # a closed class: no transition leaves it
    pin = None
    if best_state is not None:
        k = int(space.index(best_state))
        pos = int(np.searchsorted(sup, k))
        if k >= 0 and pos < sup.size and sup[pos] == k:
            pin = pos
    pi_s, residual = stationary_law(Qs, pin=pin)
    pi = np.zeros(space.n_states)
    pi[sup] = pi_s
    p_j = np.bincount(space.minority, weights=pi, minlength=J + 1)
    return _Stationary(space, outflow, sup, Qs, pi_s, pi, p_j, float(residual),
                       _tail_estimate(p_j), space.states[sup[int(np.argmax(pi_s))]])


def _level_flux(st: _Stationary) -> np.ndarray:
    """Stationary probability flux from each minority level j to j + 1 [s^-1], shape (J+1,)."""
    Q = st.generator.tocoo()
    j = st.space.minority[st.support]
    up = j[Q.col] == j[Q.row] + 1
    flux = np.zeros(st.p_j.size)
    np.add.at(flux, j[Q.row[up]], st.pi_support[Q.row[up]] * Q.data[up])
    return flux


def solve(
    model: Model,
    *,
    freqs: np.ndarray | None = None,
    times: np.ndarray | None = None,
    x0: np.ndarray | None = None,
    tol: float = 1e-10,
    max_states: int = DEFAULT_MAX_STATES,
    max_pairs: int | None = None,
) -> ExactResult:
    """Solve the master equation of a model exactly on an automatically sized truncation.

    Parameters
    ----------
    model : Model
    freqs : array_like, optional
        Frequencies > 0 of the spectra [Hz]; no spectra when omitted.
    times : array_like, optional
        Times >= 0 of the transient [s]; no transient when omitted.
    x0 : array_like of int, shape (S,), optional
        Start state of the transient (a point mass) [count].  Default: the integer state of
        the right charge nearest the exact stationary mean (:meth:`Model.nearest_neutral_state`)
        plus the scenario's ``[start] excess_pairs``.  Pass the engine's start state to compare
        with a Monte Carlo run.  ``x0`` also selects the stationary class when some channels
        are absent and the chain is reducible.
    tol : float
        Largest accepted probability outside the truncation: the stationary tail estimate and,
        with ``times``, the probability absorbed by the last time.
    max_states : int
        Refuse (:class:`StateSpaceTooLarge`) rather than build more states [states].
    max_pairs : int, optional
        Fix the truncation J (largest minority count) instead of growing it; a
        :class:`TruncationWarning` is issued when the error estimate exceeds ``tol``.

    Returns
    -------
    ExactResult

    Raises
    ------
    StateSpaceTooLarge
        When the truncation that ``tol`` needs has more than ``max_states`` states; the
        message gives the number.
    ValueError
        On a bad ``x0`` (wrong length, charge or range), frequencies <= 0 or negative times.

    Notes
    -----
    ``J`` starts at 15 (or twice the start state's minority count) and doubles until the
    error estimates are below ``tol`` (before refusing, the truncation is enlarged to the
    largest size ``max_states`` allows); it is then cut back to the levels ``tol`` needs with
    a factor 100 of margin (module notes).  Costs: generator assembly is vectorised (about
    1.5 s per million states); the stationary law is one sparse LU; each frequency is one
    complex sparse LU; the transient costs about ``||Q||_1 t`` sparse products until the law
    has relaxed to the stationary one (:func:`transient`).

    References
    ----------
    Munsky & Khammash, J. Chem. Phys. 124, 044104 (2006); see the module notes.

    Examples
    --------
    >>> import grmc
    >>> from grmc.exact import solve
    >>> scen = grmc.load_scenario(text='''title = "t"
    ... [material]
    ... temperature_K = 300.0
    ... intrinsic_density_cm3 = 1.0e15
    ... radiative_cm3_s = 1.0e-10
    ... [volume]
    ... volume_cm3 = 1.0e-15''')
    >>> res = solve(grmc.build_model(scen))
    >>> round(float(res.mean[0]), 6)
    0.697775
    """
    if not (tol > 0):
        raise ValueError(f"tol must be > 0, got {tol}")
    S = model.n_species
    capacity = tuple(int(c) for c in model.capacity[2:])
    n_cfg = _n_configs(capacity)
    if times is not None:
        times = np.atleast_1d(np.asarray(times, dtype=np.float64))
        if np.any(~np.isfinite(times)) or np.any(times < 0):
            raise ValueError("times must be finite and >= 0 [s]")
    if freqs is not None:
        freqs = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
        if np.any(~np.isfinite(freqs)) or np.any(freqs <= 0):
            raise ValueError("frequencies must be finite and > 0 [Hz]")
    if x0 is not None:
        x0 = _check_state(model, x0)

    def j_of(x):
        return int(min(x[0], x[1]))

    if max_pairs is not None:
        J = int(max_pairs)
        if x0 is not None and j_of(x0) > J:
            raise ValueError(f"x0 has {j_of(x0)} minority carriers, more than max_pairs = {J}")
    else:
        J = _FIRST_J if x0 is None else max(_FIRST_J, 2 * j_of(x0) + 1)
    J_limit = max_states // n_cfg - 1
    if J > J_limit:
        raise StateSpaceTooLarge(
            n_cfg * (J + 1), max_states,
            f"{n_cfg:,} trap configuration(s) x {J + 1} minority-carrier levels at the least",
            lower_bound=True,
        )

    best_state = None  # most probable state of the previous truncation: the next pin
    trimmed = max_pairs is not None
    while True:
        st = _stationary_at(model, J, x0, best_state)
        best_state = st.best_state
        if st.mass_outside < tol and not trimmed:
            # Doubling overshoots: keep only the levels the tolerance needs (a factor 100 of
            # margin for the tail estimator), which also lowers ||Q|| for the transient.
            trimmed = True
            beyond = np.cumsum(st.p_j[::-1])[::-1] - st.p_j  # P(j > J') for J' = 0..J
            low = 1 if x0 is None else max(1, j_of(x0))
            enough = beyond + st.mass_outside <= 1e-2 * tol
            if times is not None:
                # the absorbing truncation J' leaks about flux(J' -> J'+1) per unit time
                enough &= _level_flux(st) * float(times.max()) <= 1e-2 * tol
            fits = np.nonzero(enough)[0]
            J_trim = max(int(fits[0]) if fits.size else J, low)
            if J_trim < 0.8 * J:
                cand = _stationary_at(model, J_trim, x0, best_state)
                if cand.mass_outside < tol:
                    st, J = cand, J_trim
        space, outflow, sup, Qs = st.space, st.outflow, st.support, st.generator
        pi_s, pi, p_j = st.pi_support, st.pi, st.p_j
        residual, mass_outside = st.residual, st.mass_outside
        ok = mass_outside < tol
        x_start = x0
        lost = None
        if ok and times is not None:
            if x_start is None:
                mean, _ = _moments(space.states, pi)
                x_start = _default_start(model, mean)
            i0 = int(space.index(x_start))
            if i0 < 0:
                ok = False
            else:
                Qa, _ = generator(model, space, boundary="absorbing")
                p0 = np.zeros(space.n_states)
                p0[i0] = 1.0
                P = transient(Qa, p0, times, stationary=pi)
                lost = np.clip(1.0 - P.sum(axis=1), 0.0, None)
                ok = float(lost.max()) < tol
        if ok or max_pairs is not None:
            break
        J_next = 2 * (J + 1) - 1
        if J_next > J_limit:
            if J < J_limit:
                J_next = J_limit
            else:
                needed, how = _needed_states(model, space, pi, p_j, tol)
                now = (f"{J + 1:,} levels leave about {mass_outside:.3g} of the probability "
                       "outside" if math.isfinite(mass_outside)
                       else f"the law still rises at the last of {J + 1:,} levels")
                raise StateSpaceTooLarge(
                    needed, max_states,
                    f"{n_cfg:,} trap configuration(s) x {needed // n_cfg:,} minority-carrier "
                    f"levels, {how}; {now}",
                )
        J = J_next

    if max_pairs is not None and not ok:
        warnings.warn(
            f"with max_pairs = {J} the estimated probability outside the truncation is "
            f"{mass_outside if lost is None else max(mass_outside, float(lost.max())):.3g} "
            f"> tol = {tol:g}", TruncationWarning, stacklevel=2,
        )

    mean, cov = _moments(space.states, pi)
    out_rate = float(pi @ outflow)
    psd = psd_matrix = psd_eh = flux_psd = flux_mean = flux_white = None
    if freqs is not None:
        psd_matrix = spectral_matrix(Qs, pi_s, space.states[sup].astype(np.float64), freqs)
        psd = np.stack([psd_matrix[s, s].real for s in range(S)])
        psd_eh = psd_matrix[0, 1].copy()
    if np.any(model.flow_weight):
        K, K2 = flux_matrices(model, space, sup)
        flux_mean = float(pi_s @ np.asarray(K.sum(axis=1)).ravel())
        flux_white = 2.0 * float(pi_s @ np.asarray(K2.sum(axis=1)).ravel())
        if freqs is not None:
            flux_mean, flux_psd = flux_spectrum(Qs, pi_s, K, K2, freqs)
    t_mean = t_var = None
    if times is not None:
        if lost is None:  # max_pairs fixed and the start outside: refuse
            raise ValueError(f"the start state {x_start} is outside the truncation J = {J}")
        X = space.states.astype(np.float64)
        mass = P.sum(axis=1)
        t_mean = (P @ X) / mass[:, None]
        t_var = np.empty_like(t_mean)
        for k in range(times.size):  # centred sums: no cancellation for large counts
            t_var[k] = (P[k] @ (X - t_mean[k]) ** 2) / mass[k]
    return ExactResult(
        species=tuple(model.species),
        states=space.states,
        probability=pi,
        mean=mean,
        var=np.diag(cov).copy(),
        covariance=cov,
        mass_outside=float(mass_outside),
        outflow_rate=out_rate,
        n_states=space.n_states,
        max_pairs=J,
        residual=float(residual),
        freqs=freqs,
        psd=psd,
        psd_matrix=psd_matrix,
        psd_cross_eh=psd_eh,
        times=times,
        x0=None if x_start is None else np.asarray(x_start, dtype=np.int64),
        transient_mean=t_mean,
        transient_var=t_var,
        transient_mass_lost=lost,
        flux_mean=flux_mean,
        flux_white=flux_white,
        flux_psd=flux_psd,
        _generator=Qs,
        _support=sup,
    )


def _check_state(model: Model, x) -> np.ndarray:
    x = np.asarray(x)
    if x.shape != (model.n_species,):
        raise ValueError(f"x0 must have {model.n_species} counts {model.species}, got {x.shape}")
    if not np.all(np.equal(np.round(x), x)):
        raise ValueError(f"x0 must hold integer counts, got {x}")
    x = x.astype(np.int64)
    if np.any(x < 0):
        raise ValueError(f"x0 has a negative count: {x}")
    cap = model.capacity
    bounded = cap >= 0
    if np.any(x[bounded] > cap[bounded]):
        raise ValueError(f"x0 exceeds a trap level's count {cap[bounded].tolist()}: {x}")
    q = int(x @ model.charge_weights)
    if q != model.charge:
        raise ValueError(f"x0 has charge {q}, the model's states have {model.charge}")
    return x


def _default_start(model: Model, mean: np.ndarray) -> np.ndarray:
    x = model.nearest_neutral_state(mean).astype(np.int64)
    extra = int(model.scenario.start.excess_pairs)
    x[0] += extra
    x[1] += extra
    return x


def _needed_states(model: Model, space: StateSpace, pi: np.ndarray, p_j: np.ndarray,
                   tol: float) -> tuple[int, str]:
    """Estimated states of a truncation whose tail is below ``tol``, and how it was found.

    Where the marginal law of ``j`` decays at the top, the geometric tail is extrapolated;
    otherwise the truncation is below the bulk of the law and the minority count is estimated
    from the model's macroscopic laws (:meth:`Model.drift`) with the trap occupancies held at
    their current mean, plus ten standard deviations of a Poisson count.
    """
    J = space.max_pairs
    n_cfg = space.n_states // (J + 1)
    last, prev = float(p_j[-1]), (float(p_j[-2]) if p_j.size > 1 else 0.0)
    if last > 0 and prev > last:
        r = last / prev
        tail = last * r / (1 - r)
        extra = math.ceil(math.log(tol / tail) / math.log(r)) if tail > tol else 1
        return n_cfg * (J + 1 + max(extra, 1)), "extrapolating the decay of the law"
    m_mean = pi @ space.states[:, 2:].astype(np.float64)
    j_star = _minority_scale(model, m_mean)
    levels = max(math.ceil(j_star + 10.0 * math.sqrt(j_star) + 10.0), 2 * (J + 1))
    return n_cfg * levels, f"estimated from about {j_star:.3g} minority carriers (continuum)"


def _minority_scale(model: Model, m_mean: np.ndarray) -> float:
    """Minority count at which its macroscopic drift vanishes, trap occupancies held fixed."""
    msum = float(np.sum(m_mean))
    excess = model.charge - msum  # N_e - N_h at this occupancy
    low = max(0.0, excess)
    minority = 1 if excess > 0 else 0

    def drift(j: float) -> float:
        x = np.concatenate([[low + j, low + j - excess], m_mean])
        return float(model.drift(x)[minority])

    if drift(0.0) <= 0.0:
        return 0.0
    lo, hi = 0.0, 1.0
    while drift(hi) > 0.0 and hi < 1e18:
        lo, hi = hi, 2.0 * hi
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if drift(mid) > 0.0:
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-9 * hi:
            break
    return 0.5 * (lo + hi)


# --------------------------------------------------------------------------------------------
# Closed forms used by the tests and by users as references
# --------------------------------------------------------------------------------------------


def pair_reaction_exact(lam: float, d: int) -> tuple[float, float]:
    """Exact stationary mean and variance of the reversible pair reaction.

    Pair generation at rate ``g`` and annihilation at rate ``k N_e N_h`` with the difference
    ``d = N_e - N_h`` fixed (intrinsic or doped volume with band-to-band processes only).

    Parameters
    ----------
    lam : float
        ``lambda = g / k`` [count^2]; ``n_i^2 V^2`` in the dark.
    d : int
        ``N_e - N_h`` [count].

    Returns
    -------
    mean_h : float  Stationary mean of N_h [count]
    var_h : float  Stationary variance of N_h (equal to that of N_e) [count^2]

    Notes
    -----
    With ``z = 2 sqrt(lambda)`` (Darvey, Ninham & Staff 1966):

        P(N_h = n) = lambda^(n + d/2) / (n! (n + d)! I_d(z)),
        <N_h> = sqrt(lambda) I_{d+1}(z) / I_d(z),
        var = lambda - d <N_h> - <N_h>^2,

    the last from the balance ``<N_h (N_h + d)> = lambda``.  The exponentially scaled
    :func:`scipy.special.ive` keeps the ratio finite for any ``lambda``.  The continuum answer
    is ``(-d + sqrt(d^2 + 4 lambda)) / 2``.

    References
    ----------
    R. M. Darvey, B. W. Ninham and P. J. Staff, J. Chem. Phys. 45, 2145 (1966).
    """
    lam = float(lam)
    d = int(d)
    if not lam > 0:
        raise ValueError(f"lambda must be > 0, got {lam}")
    z = 2.0 * math.sqrt(lam)
    mean = math.sqrt(lam) * float(special.ive(abs(d + 1), z) / special.ive(abs(d), z))
    var = lam - d * mean - mean * mean
    return mean, var


def pair_reaction_law(lam: float, d: int, n: np.ndarray) -> np.ndarray:
    """``P(N_h = n)`` of the reversible pair reaction (Darvey, Ninham & Staff 1966).

    Parameters
    ----------
    lam : float  ``g / k`` [count^2]
    d : int  ``N_e - N_h`` [count]
    n : array_like of int  Hole counts [count]

    Returns
    -------
    ndarray  Probabilities (0 where ``n < max(0, -d)``)
    """
    n = np.asarray(n, dtype=np.float64)
    d = int(d)
    z = 2.0 * math.sqrt(lam)
    valid = (n >= 0) & (n + d >= 0)
    nn = np.where(valid, n, 0.0)
    log_p = ((nn + d / 2.0) * math.log(lam) - special.gammaln(nn + 1.0)
             - special.gammaln(nn + d + 1.0) - (math.log(special.ive(abs(d), z)) + z))
    return np.where(valid, np.exp(log_p), 0.0)


def telegraph_psd(f: np.ndarray, tau_1: float, tau_0: float, delta: float = 1.0) -> np.ndarray:
    """One-sided PSD of a random telegraph signal (two-state Markov process).

    Parameters
    ----------
    f : array_like  Frequencies >= 0 [Hz]
    tau_1 : float  Mean dwell time in the upper state (trap filled) [s]
    tau_0 : float  Mean dwell time in the lower state (trap empty) [s]
    delta : float  Step between the two levels [unit u]

    Returns
    -------
    ndarray  ``S(f)`` [u^2/Hz]

    Notes
    -----
    Machlup (1954):

        S(f) = 4 Delta^2 / ((tau_1 + tau_0) ((1/tau_1 + 1/tau_0)^2 + (2 pi f)^2)),

    a Lorentzian with ``1/tau = 1/tau_1 + 1/tau_0`` and variance
    ``Delta^2 tau_1 tau_0 / (tau_1 + tau_0)^2``.

    References
    ----------
    S. Machlup, "Noise in semiconductors: spectrum of a two-parameter random signal",
    J. Appl. Phys. 25, 341 (1954).
    """
    f = np.asarray(f, dtype=np.float64)
    rate = 1.0 / tau_1 + 1.0 / tau_0
    return 4.0 * delta**2 / ((tau_1 + tau_0) * (rate**2 + (2.0 * math.pi * f) ** 2))
