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
``2 (i w - A)^-1 D (-i w - A^T)^-1`` (docs/physics-notes.md), is

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
from typing import Literal, NamedTuple

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy import special
from scipy.sparse import csgraph

from .model import Model

__all__ = [
    "DEFAULT_MAX_STATES",
    "ExactRefusal",
    "ExactResult",
    "ExactUnresolved",
    "Resolvent",
    "estimate_states",
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

#: Fill-reducing column ordering of the sparse LU.  COLAMD keeps the fill of generators and
#: resolvents near that of the band the state order gives, whatever the pivoting; minimum
#: degree on A^T + A lost that structure under partial pivoting (measured: a 3311-state
#: one-level box, 1.8e6 factor entries and 3.8 s against 8e4 and 0.03 s with COLAMD).
_ORDERING = "COLAMD"

#: L1 distance to the stationary law below which a transient is taken as relaxed.
_STATIONARY_L1 = 1e-12

#: States per chunk when evaluating propensities (bounds the temporary memory).
_CHUNK = 1 << 18

#: Most factor entries the :class:`Resolvent` keeps (16 bytes each) [entries].
_LU_BUDGET = 4_000_000

#: Where the factors hold at least this many entries, a frequency near an already
#: factorised one is solved by preconditioned GMRES instead of a new LU (below it a new LU is
#: cheaper than GMRES's Python-level iterations: measured 1.6 s against 9.2 s for 68
#: frequencies of a 2993-state box whose factors hold about 1e5 entries) [entries].
_REUSE_FILL = 1_000_000
#: Largest ratio of two frequencies for which a kept LU preconditions the other [1].
_REUSE_RATIO = 4.0

#: Most factor entries the spectra may touch, factorisations and solves together [entries].
_MAX_LU_WORK = 3.0e9

#: Trap levels of more than this many traps keep a window of occupancies [count].
_WINDOW_MIN = 64

#: Most sparse matrix-vector products a transient may take (``||Q||_1 t`` summed over the
#: steps); beyond it the transient is refused at once rather than run for minutes.
_MAX_PRODUCTS = 2.0e6


class ExactRefusal(ValueError):
    """The exact solver declines a case it cannot answer within its limits (one-line reason)."""


class StateSpaceTooLarge(ExactRefusal):
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


class ExactUnresolved(ExactRefusal):
    """The chain is too stiff for double precision, or its transient too long to follow."""


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
    low, high : tuple of int  The occupancies kept, ``low_k <= M_k <= high_k`` [count]
        (default the whole range ``0 .. T_k``)

    Notes
    -----
    State ``i`` is trap configuration ``i // (J + 1)`` (mixed radix over the levels, the last
    level fastest) with minority count ``j = i % (J + 1)``.
    """

    states: np.ndarray
    max_pairs: int
    capacity: tuple[int, ...]
    charge: int
    low: tuple[int, ...] | None = None
    high: tuple[int, ...] | None = None

    def __post_init__(self):
        if self.low is None:
            object.__setattr__(self, "low", (0,) * len(self.capacity))
        if self.high is None:
            object.__setattr__(self, "high", tuple(self.capacity))

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
        return _index(x, self.low, self.high, self.charge, self.max_pairs)


def _strides(span: tuple[int, ...]) -> np.ndarray:
    sizes = np.asarray(span, dtype=np.int64) + 1
    strides = np.ones(len(span), dtype=np.int64)
    for k in range(len(span) - 2, -1, -1):
        strides[k] = strides[k + 1] * sizes[k + 1]
    return strides


def _n_configs(span: tuple[int, ...]) -> int:
    return int(np.prod(np.asarray(span, dtype=np.float64) + 1.0)) if len(span) else 1


def _index(x: np.ndarray, low: tuple[int, ...], high: tuple[int, ...], charge: int,
           J: int) -> np.ndarray:
    ne, nh, m = x[..., 0], x[..., 1], x[..., 2:]
    lo = np.asarray(low, dtype=np.int64)
    hi = np.asarray(high, dtype=np.int64)
    ok = (ne >= 0) & (nh >= 0) & np.all((m >= lo) & (m <= hi), axis=-1)
    ok &= ne - nh + m.sum(axis=-1) == charge
    j = np.minimum(ne, nh)
    ok &= j <= J
    span = tuple(int(v) for v in hi - lo)
    cfg = ((m - lo) * _strides(span)).sum(axis=-1) if len(low) else np.zeros_like(ne)
    return np.where(ok, cfg * (J + 1) + j, -1)


def state_space(model: Model, max_pairs: int, *, low=None, high=None) -> StateSpace:
    """Enumerate the truncated state space of a model.

    Parameters
    ----------
    model : Model
    max_pairs : int
        J, the largest minority-carrier count ``min(N_e, N_h)`` kept [count].
    low, high : sequence of int, optional
        Occupancy window of each trap level, ``low_k <= M_k <= high_k`` [count]; default
        the whole range ``0 .. T_k``.

    Returns
    -------
    StateSpace
        ``prod_k (high_k - low_k + 1) * (J + 1)`` states, each of the model's charge.
    """
    J = int(max_pairs)
    if J < 0:
        raise ValueError(f"max_pairs must be >= 0, got {max_pairs}")
    capacity = tuple(int(c) for c in model.capacity[2:])
    low = (0,) * len(capacity) if low is None else tuple(int(v) for v in low)
    high = capacity if high is None else tuple(int(v) for v in high)
    if len(low) != len(capacity) or len(high) != len(capacity) or not all(
            0 <= lo <= hi <= c for lo, hi, c in zip(low, high, capacity)):
        raise ValueError(f"occupancy window {low}..{high} outside 0..{capacity}")
    span = tuple(hi - lo for lo, hi in zip(low, high))
    n_cfg = _n_configs(span)
    S = model.n_species
    idx = np.arange(n_cfg * (J + 1), dtype=np.int64)
    cfg, j = np.divmod(idx, J + 1)
    states = np.empty((idx.size, S), dtype=np.int64)
    if capacity:
        m = np.stack(np.unravel_index(cfg, tuple(c + 1 for c in span)), axis=-1)
        m += np.asarray(low, dtype=np.int64)
        states[:, 2:] = m
        msum = m.sum(axis=1)
    else:
        msum = np.zeros_like(idx)
    base = np.maximum(0, model.charge - msum)
    states[:, 0] = base + j
    states[:, 1] = states[:, 0] + msum - model.charge
    states.setflags(write=False)
    return StateSpace(states=states, max_pairs=J, capacity=capacity, charge=int(model.charge),
                      low=low, high=high)


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


def _pinned_solve(Q: sp.csr_matrix, k: int, stats: dict | None = None) -> np.ndarray:
    """Solve pi^T Q = 0 with pi_k = 1 (drop equation k, move column k to the right side).

    ``stats["fill"]`` receives the entries of the LU factors."""
    n = Q.shape[0]
    if n == 1:
        return np.ones(1)
    keep = np.ones(n, dtype=bool)
    keep[k] = False
    QT = Q.T.tocsr()  # rows: balance equations
    A = QT[keep][:, keep].tocsc()
    b = -QT[keep][:, [k]].toarray().ravel()
    lu = spla.splu(A, permc_spec=_ORDERING)
    if stats is not None:
        stats["fill"] = int(lu.L.nnz + lu.U.nnz)
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


def stationary_law(Q: sp.csr_matrix, *, pin: int | None = None,
                   stats: dict | None = None) -> tuple[np.ndarray, float]:
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
    stats : dict, optional
        Receives ``"fill"``, the entries of the last LU factors [entries].

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
    The solve is made on the embedded jump chain first (rows of ``Q`` divided by the exit
    rates, whose stationary vector is the flux ``pi_i |Q_ii|``; Stewart 1994, from memory):
    its entries lie in [-1, 1] whatever the spread of the rates, which keeps a chain whose
    rates span many decades (a cold volume) within the reach of the LU.  The relative
    residual is the same for both forms.
    """
    Q = sp.csr_matrix(Q)
    n = Q.shape[0]
    exit_rate = -Q.diagonal()
    if n > 1 and np.all(exit_rate > 0):
        try:
            flux, _ = _stationary_unscaled(sp.diags(1.0 / exit_rate) @ Q, pin, stats)
        except RuntimeError:
            flux = None
        if flux is not None:
            pi = flux / exit_rate
            total = pi.sum()
            if np.isfinite(total) and total > 0:
                pi /= total
                res = _relative_residual(Q, pi)
                if res <= _RESIDUAL_TOL:
                    return pi, res
    return _stationary_unscaled(Q, pin, stats)


def _stationary_unscaled(Q: sp.csr_matrix, pin: int | None,
                         stats: dict | None = None) -> tuple[np.ndarray, float]:
    """:func:`stationary_law` on ``Q`` as given (pinned LU, then eigs)."""
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
                trial = _pinned_solve(Q, k, stats)
                if not np.all(np.isfinite(trial)):
                    continue  # pinned at a state so unlikely that the others overflow
                best = int(np.argmax(trial))
                if trial[best] > 1e3 * abs(trial[k]) or trial[k] <= 0:
                    trial = _pinned_solve(Q, best, stats)
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


class Resolvent:
    """Sparse LU factorisations of ``i w I - Q`` at a set of frequencies, made once each.

    Parameters
    ----------
    Q : scipy.sparse matrix, shape (n, n)  Generator [s^-1]
    freqs : array_like, shape (F,)  Frequencies > 0 [Hz]

    Notes
    -----
    The count spectra and the flux spectrum of one chain solve with the same matrices; the
    factorisations are kept (up to about ``_LU_BUDGET`` stored entries in all) so that each
    frequency is factorised once.  Ordering: COLAMD (see ``_ORDERING``).  Where the factors
    hold ``_REUSE_FILL`` entries or more, a frequency within a factor ``_REUSE_RATIO`` of a
    factorised one is solved by GMRES preconditioned with that factorisation (Saad, Iterative Methods for
    Sparse Linear Systems, 2003, ch. 9, from memory), falling back to its own LU when GMRES
    does not reach a relative residual of 1e-13.
    """

    def __init__(self, Q: sp.spmatrix, freqs: np.ndarray):
        self.freqs = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
        if np.any(~np.isfinite(self.freqs)) or np.any(self.freqs <= 0):
            raise ValueError("frequencies must be finite and > 0 [Hz]")
        self._Q = sp.csc_matrix(Q).astype(np.complex128)
        self._eye = sp.identity(self._Q.shape[0], dtype=np.complex128, format="csc")
        self._lu: dict[int, object] = {}
        self._stored = 0
        self._fill = 0

    def solve(self, i: int, rhs: np.ndarray) -> np.ndarray:
        """``(i w_i I - Q)^-1 rhs`` at frequency number ``i``."""
        b = np.asarray(rhs, dtype=np.complex128).reshape(self._Q.shape[0], -1)
        lu = self._lu.get(i)
        if lu is None and self._fill >= _REUSE_FILL:
            x = self._solve_near(i, b)
            if x is not None:
                return x.reshape(np.shape(rhs))
        if lu is None:
            lu = self._keep(i, self._factor(i))
        factor, scale = lu
        return factor.solve(scale[:, None] * b).reshape(np.shape(rhs))

    def _keep(self, i: int, lu):
        """Keep a factorisation; over the budget, the older ones make room for it."""
        size = lu[0].L.nnz + lu[0].U.nnz
        self._fill = size  # entries of one factorisation: decides on reuse
        if self._stored + size > _LU_BUDGET:
            self._lu.clear()
            self._stored = 0
        self._lu[i] = lu
        self._stored += size
        return lu

    def _solve_near(self, i: int, b: np.ndarray) -> np.ndarray | None:
        """GMRES preconditioned by the factorisation of the nearest kept frequency within a
        factor ``_REUSE_RATIO``: ``M^-1 (i w I - Q) = I + i (w - w_j) M^-1``, whose spectrum
        stays near 1 when ``w / w_j`` is near 1 (a few iterations instead of a new LU).
        None when no kept frequency is near or GMRES does not reach 1e-13."""
        if not self._lu:
            return None
        f = float(self.freqs[i])
        j = min(self._lu, key=lambda k: abs(math.log(self.freqs[k] / f)))
        if abs(math.log(self.freqs[j] / f)) > math.log(_REUSE_RATIO):
            return None
        factor, scale_j = self._lu[j]
        w = 2.0 * math.pi * f
        scale = 1.0 / (w + np.abs(self._Q.diagonal().real))
        A = sp.csr_matrix(sp.diags(scale) @ ((1j * w) * self._eye - self._Q))
        n = A.shape[0]
        # the kept factor solves (scale_j rows of (i w_j I - Q)); undo the row scaling
        M = spla.LinearOperator((n, n), dtype=np.complex128,
                                matvec=lambda v: factor.solve(scale_j * (np.ravel(v) / scale)))
        out = np.empty_like(b)
        for c in range(b.shape[1]):
            x, info = spla.gmres(A, scale * b[:, c], M=M, rtol=1e-13, atol=0.0, restart=40,
                                 maxiter=3)
            if info != 0:
                return None
            out[:, c] = x
        return out

    def _factor(self, i: int):
        """LU of the rows of ``i w I - Q`` divided by ``w + |Q_kk|`` (entries of modulus <= 1,
        the resolvent's counterpart of the embedded jump chain), COLAMD first, then minimum
        degree on ``A^T + A`` where rounding left a zero pivot."""
        w = 2.0 * math.pi * float(self.freqs[i])
        scale = 1.0 / (w + np.abs(self._Q.diagonal().real))
        A = sp.diags(scale) @ ((1j * w) * self._eye - self._Q)
        A = sp.csc_matrix(A)
        err = None
        for spec in (_ORDERING, "MMD_AT_PLUS_A"):
            try:
                return spla.splu(A, permc_spec=spec), scale
            except RuntimeError as exc:  # SuperLU: a pivot lost to rounding
                err = exc
        rates = np.abs(self._Q.diagonal())
        raise ExactUnresolved(
            f"the resolvent at {self.freqs[i]:.3g} Hz is singular in double precision "
            f"(exit rates from {rates.min():.3g} to {rates.max():.3g} 1/s; {err})")


def spectral_matrix(
    Q: sp.spmatrix,
    probability: np.ndarray,
    observables: np.ndarray,
    freqs: np.ndarray,
    *,
    resolvent: Resolvent | None = None,
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
    (module notes): one sparse LU of ``i w I - Q`` per frequency, K solves each; pass a
    :class:`Resolvent` of the same ``Q`` and ``freqs`` to share its factorisations.
    """
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
    res = Resolvent(Q, freqs) if resolvent is None else resolvent
    for i in range(freqs.size):
        U = res.solve(i, Y)  # (n, K): (i w I - Q)^-1 y_b
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
                  freqs: np.ndarray, *,
                  resolvent: Resolvent | None = None) -> tuple[float, np.ndarray]:
    """Mean and one-sided spectrum of a collected flux of a stationary Markov chain.

    Parameters
    ----------
    Q : scipy.sparse matrix, shape (n, n)  Conservative generator on a closed class [s^-1]
    probability : ndarray, shape (n,)  Its stationary law
    K, K2 : scipy.sparse matrix, shape (n, n)  :func:`flux_matrices` on the same states
    freqs : array_like, shape (F,)  Frequencies > 0 [Hz]
    resolvent : Resolvent, optional  Factorisations of the same ``Q`` at ``freqs`` to reuse

    Returns
    -------
    mean : float  ``pi^T K 1`` [carriers/s]
    psd : ndarray, shape (F,)  ``2 [pi^T K2 1 + 2 Re u^T (i w I - Q)^-1 (v - mean)]`` [s^-1]
        (module notes)
    """
    pi = np.asarray(probability, dtype=np.float64)
    v = np.asarray(K.sum(axis=1)).ravel()
    mean = float(pi @ v)
    white = float(pi @ np.asarray(K2.sum(axis=1)).ravel())
    u = np.asarray(K.T @ pi).ravel()
    vc = (v - mean).astype(np.complex128)
    freqs = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
    if np.any(~np.isfinite(freqs)) or np.any(freqs <= 0):
        raise ValueError("frequencies must be finite and > 0 [Hz]")
    res = Resolvent(Q, freqs) if resolvent is None else resolvent
    out = np.empty(freqs.size)
    for i in range(freqs.size):
        out[i] = 2.0 * (white + 2.0 * float(np.real(u @ res.solve(i, vc))))
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
        ``"sparse"``: truncated Taylor steps of fixed size (see Notes); ``"dense"``:
        propagators by :func:`scipy.linalg.expm`; ``"auto"``: dense for stiff chains of at
        most 1000 states whose estimated sparse time would exceed the dense one.
    stationary : ndarray, shape (n,), optional
        The stationary law of the reflecting generator.  Once the normalised ``p(t)`` is
        within 1e-12 of it (L1), later times take it, scaled by the probability retained at
        that moment, instead of being computed.

    Returns
    -------
    ndarray, shape (T, n)
        ``p_J(t)``; ``1 - p_J(t).sum()`` is the probability absorbed (the FSP error bound;
        after the stationary shortcut, the absorbed probability when it was taken).

    Raises
    ------
    ExactUnresolved
        When following the law would take more than ``_MAX_PRODUCTS`` sparse products
        (about ``1.5 ||Q||_1 t``): at once without a stationary law to stop early, else as
        soon as the count passes the limit.

    Notes
    -----
    Sparse path: each step ``dt`` between sorted times is cut into ``s`` sub-steps with
    ``||A - mu I||_1 dt / s <= 4`` (``mu`` the mean of the diagonal, the shift of Al-Mohy &
    Higham 2011, section 3.1), and each sub-step is the Taylor series of
    ``exp((A - mu I) dt / s)`` summed until two successive terms fall below 2^-53 of the sum
    (their stopping rule), times ``exp(mu dt / s)``.  The sub-step parameters of a step
    length are computed once, so a uniform grid costs one sparse product per term and no
    norm estimates; the cost is about ``1.5 ||A||_1 t`` products.  The first step (often the
    settling) is followed in pieces doubling from ``dt 2^-40`` so that the stationary
    shortcut can end it soon after the law has relaxed.  Dense path: for stiff small chains the propagator ``exp(Q^T dt)`` of each distinct
    step is formed once by :func:`scipy.linalg.expm` (scaling and squaring) and applied by
    products.  The stationary shortcut holds to its threshold because a Markov semigroup is a
    contraction in L1: ``||p(t') - pi||_1 <= ||p(t) - pi||_1`` for ``t' > t``.  After it, the
    error of the law is bounded by the probability absorbed until then plus that of the
    stationary law (its ``mass_outside``), instead of growing with the stationary outflow of
    the absorbing truncation, which is an artefact of the sink.
    """
    times = _checked_times(times, method)
    A = sp.csr_matrix(Q_absorbing).T.tocsr()
    n = A.shape[0]
    order = np.argsort(times, kind="stable")
    ts = times[order]
    steps = np.diff(np.concatenate([[0.0], ts]))
    key = _step_keys(steps)
    norm = float(abs(A).sum(axis=0).max()) if n else 0.0
    dense = method == "dense" or (
        method == "auto" and n <= _DENSE_MAX and _dense_is_cheaper(A, norm, steps, key))
    if not dense and stationary is None and 1.5 * norm * float(ts[-1]) > _MAX_PRODUCTS:
        raise ExactUnresolved(_transient_too_long(norm, float(ts[-1])))
    stepper = _DenseSteps(A) if dense else _TaylorSteps(A)
    if stationary is not None:
        stationary = np.asarray(stationary, dtype=np.float64)
    out = np.empty((times.size, n))
    p = np.asarray(p0, dtype=np.float64).copy()
    for pos in range(ts.size):
        dt = steps[pos]
        pieces = [dt]
        if not dense and stationary is not None and dt > 0.0 and not np.any(steps[:pos] > 0):
            # the first step (often the settling): pieces doubling from dt 2^-40, so that the
            # shortcut can end it soon after the law has relaxed
            pieces = np.diff(np.concatenate([[0.0], dt * 2.0 ** -np.arange(40.0, -1.0, -1.0)]))
        for piece in pieces:
            if _relaxed(p, stationary):
                out[order[pos:]] = p.sum() * stationary
                return out
            if piece > 0.0:
                p = stepper.step(p, piece, key[pos])
            if getattr(stepper, "products", 0) > _MAX_PRODUCTS:
                raise ExactUnresolved(_transient_too_long(norm, float(ts[-1])))
        out[order[pos]] = p
    return out


def _checked_times(times: np.ndarray, method: str) -> np.ndarray:
    """The times of :func:`transient` as a float array, after checking them and the method."""
    times = np.atleast_1d(np.asarray(times, dtype=np.float64))
    if np.any(~np.isfinite(times)) or np.any(times < 0):
        raise ValueError("times must be finite and >= 0 [s]")
    if method not in ("auto", "sparse", "dense"):
        raise ValueError(f"method must be 'auto', 'sparse' or 'dense', got {method!r}")
    return times


def _step_keys(steps: np.ndarray) -> np.ndarray:
    """Keys of the step lengths: steps equal to 1e-12 relative (a uniform grid after
    rounding) share one key and so one propagator; 0 for empty steps [s]."""
    key = np.zeros(steps.size)
    positive = steps > 0
    key[positive] = np.exp(np.round(np.log(steps[positive]) * 1e12) / 1e12)
    return key


def _dense_is_cheaper(A: sp.csr_matrix, norm: float, steps: np.ndarray,
                      key: np.ndarray) -> bool:
    """Whether dense propagators are estimated cheaper than sparse Taylor steps.

    Rough seconds of each path: a sparse product costs its Python call (~15 us) plus ~5 ns
    per stored entry; an expm costs ~(10 + log2 ||A dt||) dense products of 2 n^3 flops at
    ~1 Gflop/s, then one matrix-vector product per time (measured on the development
    machine, common practice for such estimates).
    """
    n = A.shape[0]
    n_distinct = np.unique(key[steps > 0]).size
    sparse_cost = 1.5 * norm * float(steps.sum()) * (15e-6 + 5e-9 * A.nnz)
    squarings = 10.0 + math.log2(max(norm * float(steps.max(initial=0.0)), 1.0))
    dense_cost = n_distinct * squarings * 2e-9 * float(n) ** 3 + steps.size * 2e-9 * n * n
    return sparse_cost > dense_cost


def _transient_too_long(norm: float, t: float) -> str:
    return (f"the transient to {t:.3g} s would take about {1.5 * norm * t:.3g} sparse "
            f"products (norm of the generator {norm:.3g} 1/s), more than {_MAX_PRODUCTS:.3g}; "
            "shorten duration_s or settle_s, or use the Monte Carlo ensemble (`grmc run`)")


def _relaxed(p: np.ndarray, stationary: np.ndarray | None) -> bool:
    if stationary is None:
        return False
    mass = p.sum()
    return bool(mass > 0 and np.abs(p / mass - stationary).sum() <= _STATIONARY_L1)


class _DenseSteps:
    """Propagators ``exp(A dt)`` by :func:`scipy.linalg.expm`, one per distinct step."""

    def __init__(self, A: sp.csr_matrix):
        self.A = A.toarray()
        self.cache: dict[float, np.ndarray] = {}

    def step(self, p: np.ndarray, dt: float, key: float) -> np.ndarray:
        if key not in self.cache:
            self.cache[key] = scipy.linalg.expm(self.A * dt)
        return np.clip(self.cache[key] @ p, 0.0, None)


class _TaylorSteps:
    """``exp(A dt) p`` by shifted, truncated Taylor sub-steps (Al-Mohy & Higham 2011)."""

    def __init__(self, A: sp.csr_matrix):
        n = A.shape[0]
        self.mu = float(A.diagonal().sum()) / n if n else 0.0
        self.B = (A - self.mu * sp.identity(n, format="csr")).tocsr()
        self.norm = float(abs(self.B).sum(axis=0).max()) if n else 0.0
        self.products = 0

    def step(self, p: np.ndarray, dt: float, key: float = 0.0) -> np.ndarray:
        s = max(1, math.ceil(self.norm * dt / 4.0))
        h = dt / s
        eta = math.exp(self.mu * h)
        tol = 2.0**-53
        F = p
        for _ in range(s):
            term = F
            total = F.copy()
            c1 = np.abs(term).sum()
            for j in range(1, 200):
                term = (h / j) * (self.B @ term)
                self.products += 1
                total += term
                c2 = np.abs(term).sum()
                if c1 + c2 <= tol * np.abs(total).sum():
                    break
                c1 = c2
            F = eta * total
        return np.clip(F, 0.0, None)


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
    transient_output_var : ndarray or None, shape (T, outputs)  Variances at ``times`` of
        the model's output species (a spread trap level's total among them), only when they
        differ from the species [count^2]
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
    transient_output_var: np.ndarray | None = None
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
    j_tail: float = 0.0  # estimated probability beyond j = J
    edge_tails: np.ndarray | None = None  # (K, 2): beyond low_k and beyond high_k
    fill: int = 0  # entries of the stationary LU factors


def _stationary_at(model: Model, J: int, x0, best_state, low=None, high=None) -> _Stationary:
    """Stationary law on the truncation J (reflecting boundary) and its tail estimate."""
    space = state_space(model, J, low=low, high=high)
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
    stats: dict = {}
    try:
        pi_s, residual = stationary_law(Qs, pin=pin, stats=stats)
    except RuntimeError as exc:
        rates = np.abs(Qs.diagonal())
        raise ExactUnresolved(
            f"the stationary law of {sup.size:,} states is not resolved in double precision "
            f"(exit rates from {rates.min():.3g} to {rates.max():.3g} 1/s): {exc}") from None
    pi = np.zeros(space.n_states)
    pi[sup] = pi_s
    p_j = np.bincount(space.minority, weights=pi, minlength=J + 1)
    j_tail = _tail_estimate(p_j)
    edges = _window_tails(space, pi)
    return _Stationary(space, outflow, sup, Qs, pi_s, pi, p_j, float(residual),
                       j_tail + float(edges.sum()), space.states[sup[int(np.argmax(pi_s))]],
                       j_tail, edges, int(stats.get("fill", 0)))


def _window_tails(space: StateSpace, pi: np.ndarray) -> np.ndarray:
    """Estimated probability beyond each trap level's window edges, shape (K, 2).

    Column 0 below ``low_k``, column 1 above ``high_k``; 0 where the edge is the level's own
    bound (0 or ``T_k``).  Same geometric extrapolation as the minority levels.
    """
    K = len(space.capacity)
    out = np.zeros((K, 2))
    for k in range(K):
        lo, hi, cap = space.low[k], space.high[k], space.capacity[k]
        if lo == 0 and hi == cap:
            continue
        marg = np.bincount(space.states[:, 2 + k] - lo, weights=pi, minlength=hi - lo + 1)
        if lo > 0:
            out[k, 0] = _tail_estimate(marg[::-1])
        if hi < cap:
            out[k, 1] = _tail_estimate(marg)
    return out


def _level_flux(st: _Stationary) -> np.ndarray:
    """Stationary probability flux from each minority level j to j + 1 [s^-1], shape (J+1,)."""
    Q = st.generator.tocoo()
    j = st.space.minority[st.support]
    up = j[Q.col] == j[Q.row] + 1
    flux = np.zeros(st.p_j.size)
    np.add.at(flux, j[Q.row[up]], st.pi_support[Q.row[up]] * Q.data[up])
    return flux


# --------------------------------------------------------------------------------------------
# Driver: truncation control, transient, spectra
# --------------------------------------------------------------------------------------------


@dataclass
class _Truncation:
    """The truncation being fitted: minority levels and the trap-occupancy window."""

    J: int
    low: list[int]
    high: list[int]
    capacity: tuple[int, ...]

    @property
    def n_configs(self) -> int:
        return _n_configs(tuple(h - lo for lo, h in zip(self.low, self.high)))

    @property
    def n_states(self) -> int:
        return self.n_configs * (self.J + 1)

    def widen(self, k: int, side: int) -> None:
        """Double the room on one side of level k's window (side 0 below, 1 above)."""
        room = max(self.high[k] - self.low[k], _WINDOW_MIN // 2)
        if side == 0:
            self.low[k] = max(0, self.low[k] - room)
        else:
            self.high[k] = min(self.capacity[k], self.high[k] + room)


def _initial_truncation(model: Model, x0, max_pairs) -> _Truncation:
    """J to start from, and each trap level's window (whole range for small levels).

    A level of more than ``_WINDOW_MIN`` traps keeps ``mean +/- (10 sd + 10)`` of its
    linear-noise law (van Kampen's system-size expansion, :func:`grmc.continuum.lna`), widened
    to hold the start state; the tail checks of :func:`_fit_stationary` widen it further
    where the exact law needs it.  Without a linear-noise answer the whole range is kept.
    """
    cap = tuple(int(c) for c in model.capacity[2:])
    low, high = [0] * len(cap), list(cap)
    if max_pairs is not None:
        J = int(max_pairs)
    else:
        J = _FIRST_J if x0 is None else max(_FIRST_J, 2 * _minority_of(x0) + 1)
    if any(c > _WINDOW_MIN for c in cap) and max_pairs is None:
        from .continuum import ContinuumError, lna

        try:
            with np.errstate(all="ignore"), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = lna(model)
            mean, sd = res.mean[2:], np.sqrt(np.clip(np.diag(res.covariance)[2:], 0, None))
        except (ContinuumError, ValueError, np.linalg.LinAlgError):
            mean = None
        if mean is not None and np.all(np.isfinite(mean)) and np.all(np.isfinite(sd)):
            for k, c in enumerate(cap):
                if c <= _WINDOW_MIN:
                    continue
                half = 10.0 * sd[k] + 10.0
                low[k] = int(max(0, math.floor(mean[k] - half)))
                high[k] = int(min(c, math.ceil(mean[k] + half)))
                if x0 is not None:
                    low[k], high[k] = min(low[k], int(x0[2 + k])), max(high[k], int(x0[2 + k]))
    return _Truncation(J, low, high, cap)


def estimate_states(model: Model) -> int:
    """States the truncation of :func:`solve` is expected to need, without building it.

    The trap configurations of the first truncation (every occupancy of a small level, the
    window about the linear-noise law of a large one) times the minority levels of a
    Poisson-like count about the continuum minority mean (``j* + 10 sqrt(j*) + 10``, at
    least the first J).  An estimate: the solve itself enlarges the truncation where the
    exact law needs it.

    Parameters
    ----------
    model : Model

    Returns
    -------
    int  [states]
    """
    from .continuum import ContinuumError, steady_state

    tr = _initial_truncation(model, None, None)
    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            x = steady_state(model)
        minority = float(min(x[0], x[1]))
    except (ContinuumError, ValueError, np.linalg.LinAlgError):
        minority = 0.0
    levels = max(_FIRST_J, math.ceil(minority + 10.0 * math.sqrt(minority) + 10.0)) + 1
    return int(min(float(tr.n_configs) * levels, float(np.iinfo(np.int64).max)))


def _minority_of(x) -> int:
    return int(min(x[0], x[1]))


def _too_large(model: Model, tr: _Truncation, st: _Stationary | None, max_states: int,
               tol: float) -> StateSpaceTooLarge:
    n_cfg = tr.n_configs
    if st is None:
        return StateSpaceTooLarge(
            tr.n_states, max_states,
            f"{n_cfg:,} trap configuration(s) x {tr.J + 1} minority-carrier levels at the "
            "least", lower_bound=True)
    needed, how = _needed_states(model, st.space, st.pi, st.p_j, tol)
    mass = st.mass_outside
    now = (f"{st.space.max_pairs + 1:,} levels leave about {mass:.3g} of the probability "
           "outside" if math.isfinite(mass)
           else f"the law still rises at the last of {st.space.max_pairs + 1:,} levels")
    return StateSpaceTooLarge(
        needed, max_states,
        f"{n_cfg:,} trap configuration(s) x {needed // n_cfg:,} minority-carrier levels, "
        f"{how}; {now}")


def _fit_stationary(model: Model, tr: _Truncation, x0, tol: float, max_states: int,
                    fixed: bool, best=None) -> _Stationary:
    """Grow the truncation until the estimated probability outside it is below ``tol``.

    Where the minority levels' tail is too heavy J doubles; where a trap window's edge holds
    too much, that side widens.  Before refusing, J is raised to the largest size
    ``max_states`` allows.
    """
    if tr.n_states > max_states:
        raise _too_large(model, tr, None, max_states, tol)
    share = tol / (1 + 2 * len(tr.capacity))
    while True:
        st = _stationary_at(model, tr.J, x0, best, tr.low, tr.high)
        best = st.best_state
        if fixed or st.mass_outside < tol:
            return st
        grew = False
        for k, side in zip(*np.nonzero(st.edge_tails >= share)):
            before = tr.n_configs
            tr.widen(int(k), int(side))
            grew |= tr.n_configs > before
        if tr.n_states > max_states:
            raise _too_large(model, tr, st, max_states, tol)
        if st.j_tail < share and grew:
            continue
        J_limit = max_states // tr.n_configs - 1
        J_next = 2 * (tr.J + 1) - 1
        if J_next > J_limit:
            if tr.J >= J_limit:
                raise _too_large(model, tr, st, max_states, tol)
            J_next = J_limit
        tr.J = J_next


def _trim(model: Model, st: _Stationary, tr: _Truncation, x0, tol: float,
          times) -> _Stationary:
    """Cut J back to the levels ``tol`` needs (a factor 100 of margin for the tail estimate).

    Doubling overshoots; fewer levels also lower ``||Q||`` for the transient.  With times,
    the absorbing truncation J' leaks about flux(J' -> J' + 1) per unit time, which must stay
    below the margin too.
    """
    J = st.space.max_pairs
    beyond = np.cumsum(st.p_j[::-1])[::-1] - st.p_j  # P(j > J') for J' = 0..J
    low = 1 if x0 is None else max(1, _minority_of(x0))
    enough = beyond + st.mass_outside <= 1e-2 * tol
    if times is not None:
        enough &= _level_flux(st) * float(times.max()) <= 1e-2 * tol
    fits = np.nonzero(enough)[0]
    J_trim = max(int(fits[0]) if fits.size else J, low)
    if J_trim < 0.8 * J:
        cand = _stationary_at(model, J_trim, x0, st.best_state, tr.low, tr.high)
        if cand.mass_outside < tol:
            tr.J = J_trim
            return cand
    return st


class _Transient(NamedTuple):
    start: np.ndarray | None  # start state [count]
    P: np.ndarray | None  # (T, n) probabilities on the truncation
    lost: np.ndarray | None  # (T,) probability absorbed by each time


def _transient_on(model: Model, st: _Stationary, x0, times) -> _Transient:
    """Transient law from ``x0`` (default: nearest state to the exact mean plus the pulse)."""
    space = st.space
    x_start = x0
    if x_start is None:
        mean, _ = _moments(space.states, st.pi)
        x_start = _default_start(model, mean)
    i0 = int(space.index(x_start))
    if i0 < 0:
        return _Transient(x_start, None, None)
    Qa, _ = generator(model, space, boundary="absorbing")
    _refuse_long_transient(model, Qa, float(np.max(times)))
    p0 = np.zeros(space.n_states)
    p0[i0] = 1.0
    P = transient(Qa, p0, times, stationary=st.pi)
    return _Transient(x_start, P, np.clip(1.0 - P.sum(axis=1), 0.0, None))


def _refuse_long_transient(model: Model, Qa: sp.spmatrix, t_last: float) -> None:
    """Refuse at once a transient whose Taylor steps would pass ``_MAX_PRODUCTS``.

    The law relaxes to within 1e-12 of the stationary one in about 60 of the slowest
    relaxation times (the linear-noise estimate, :func:`grmc.continuum.lna`; a point mass
    decays as exp(-t/tau) times at most 1e14 for the likeliest starts), so the steps needed
    are about ``1.5 ||Q||_1 min(t_last, 60 tau)``.
    """
    from .continuum import ContinuumError, lna

    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            taus = lna(model).relaxation_times
        horizon = min(t_last, 60.0 * float(taus.max())) if taus.size else t_last
    except (ContinuumError, ValueError, np.linalg.LinAlgError):
        horizon = t_last
    norm = 2.0 * float(np.abs(Qa.diagonal()).max()) if Qa.shape[0] else 0.0
    if 1.5 * norm * horizon > _MAX_PRODUCTS:
        raise ExactUnresolved(_transient_too_long(norm, horizon))


def _fit_transient(model: Model, st: _Stationary, tr: _Truncation, x0, times, tol: float,
                   max_states: int, fixed: bool) -> tuple[_Stationary, _Transient]:
    """Enlarge the truncation (J doubled, windows widened) until the transient loses < tol."""
    while True:
        tra = _transient_on(model, st, x0, times)
        if fixed or (tra.lost is not None and float(tra.lost.max()) < tol):
            return st, tra
        for k in range(len(tr.capacity)):
            tr.widen(k, 0)
            tr.widen(k, 1)
        tr.J = 2 * (tr.J + 1) - 1
        if tr.n_states > max_states:
            raise _too_large(model, tr, st, max_states, tol)
        st = _fit_stationary(model, tr, x0, tol, max_states, False, st.best_state)


def _refuse_heavy_spectra(st: _Stationary, freqs: np.ndarray | None) -> None:
    """Refuse at once spectra whose factorisations would hold too many entries in all.

    The resolvent's factors have about the stationary LU's fill (the same pattern, complex
    entries); a factorisation touches each entry about 20 times, a solve once.  The
    frequencies need one factorisation each, or, where the factors hold ``_REUSE_FILL``
    entries or more, one per factor ``_REUSE_RATIO`` of frequency plus about ten
    preconditioned solves per observable at every frequency.

    Raises
    ------
    ExactUnresolved
        When the entries touched exceed ``_MAX_LU_WORK`` (several large trap levels make
        the factors dense much faster than the states grow).
    """
    if freqs is None or freqs.size == 0 or st.fill == 0:
        return
    n = st.support.size
    if st.fill >= _REUSE_FILL:
        span = math.log(float(freqs.max() / freqs.min()))
        count = 1 + int(span / math.log(_REUSE_RATIO))
        work = st.fill * (20.0 * count + 10.0 * freqs.size * (st.space.states.shape[1] + 1))
    else:
        count = freqs.size
        work = st.fill * 20.0 * count
    if work > _MAX_LU_WORK:
        raise ExactUnresolved(
            f"the spectra of {n:,} states at {freqs.size} frequencies would touch about "
            f"{work:.2g} factor entries ({count} sparse factorisations of about {st.fill:,} "
            f"entries), more than {_MAX_LU_WORK:.3g} (several large trap levels make the "
            "factors dense); use the Monte Carlo ensemble (`grmc run`) or fewer frequencies")


def _check_inputs(model: Model, freqs, times, x0, tol):
    if not (tol > 0):
        raise ValueError(f"tol must be > 0, got {tol}")
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
    return freqs, times, x0


def _spectra(model: Model, st: _Stationary, freqs) -> dict:
    """Count spectra and the collected flux, one sparse LU per frequency shared by both."""
    S = model.n_species
    sup, Qs, pi_s = st.support, st.generator, st.pi_support
    out = dict(psd=None, psd_matrix=None, psd_cross_eh=None, flux_psd=None, flux_mean=None,
               flux_white=None)
    resolvent = None if freqs is None else Resolvent(Qs, freqs)
    if freqs is not None:
        out["psd_matrix"] = spectral_matrix(Qs, pi_s, st.space.states[sup].astype(np.float64),
                                            freqs, resolvent=resolvent)
        out["psd"] = np.stack([out["psd_matrix"][s, s].real for s in range(S)])
        out["psd_cross_eh"] = out["psd_matrix"][0, 1].copy()
    if np.any(model.flow_weight):
        K, K2 = flux_matrices(model, st.space, sup)
        out["flux_mean"] = float(pi_s @ np.asarray(K.sum(axis=1)).ravel())
        out["flux_white"] = 2.0 * float(pi_s @ np.asarray(K2.sum(axis=1)).ravel())
        if freqs is not None:
            out["flux_mean"], out["flux_psd"] = flux_spectrum(Qs, pi_s, K, K2, freqs,
                                                              resolvent=resolvent)
    return out


def _transient_moments(P: np.ndarray, states: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    X = states.astype(np.float64)
    mass = P.sum(axis=1)
    t_mean = (P @ X) / mass[:, None]
    t_var = np.empty_like(t_mean)
    for k in range(P.shape[0]):  # centred sums: no cancellation for large counts
        t_var[k] = (P[k] @ (X - t_mean[k]) ** 2) / mass[k]
    return t_mean, t_var


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
    ExactUnresolved
        When the stationary law cannot be resolved in double precision or the transient
        would take more than ``_MAX_PRODUCTS`` sparse products; the message says why.
    ValueError
        On a bad ``x0`` (wrong length, charge or range), frequencies <= 0 or negative times.

    Notes
    -----
    ``J`` starts at 15 (or twice the start's minority count) and doubles until the error
    estimates are below ``tol`` (:func:`_fit_stationary`), then is cut back with a factor 100
    of margin (:func:`_trim`).  A level of more than 64 traps keeps a window of occupancies
    about its linear-noise law, widened where the exact law's edges hold more than ``tol``.
    Costs: one sparse LU for the stationary law, one complex sparse LU per frequency (shared
    by the count and flux spectra), about ``1.5 ||Q||_1 t`` sparse products for a transient
    until it has relaxed (:func:`transient`).

    References
    ----------
    Munsky & Khammash, J. Chem. Phys. 124, 044104 (2006); see the module notes.

    Examples
    --------
    >>> res = solve(grmc.build_model(grmc.load_scenario("scenarios/p_type_trap_box.toml")))
    >>> res.n_states, res.mass_outside < 1e-10   # doctest: +SKIP
    """
    freqs, times, x0 = _check_inputs(model, freqs, times, x0, tol)
    fixed = max_pairs is not None
    tr = _initial_truncation(model, x0, max_pairs)
    if x0 is not None and fixed and _minority_of(x0) > tr.J:
        raise ValueError(f"x0 has {_minority_of(x0)} minority carriers, more than "
                         f"max_pairs = {tr.J}")
    st = _fit_stationary(model, tr, x0, tol, max_states, fixed)
    if not fixed:
        st = _trim(model, st, tr, x0, tol, times)
    _refuse_heavy_spectra(st, freqs)
    tra = _Transient(x0, None, None)
    if times is not None:
        st, tra = _fit_transient(model, st, tr, x0, times, tol, max_states, fixed)
    lost = tra.lost
    worst = st.mass_outside if lost is None else max(st.mass_outside, float(lost.max()))
    if fixed and not worst < tol:
        warnings.warn(
            f"with max_pairs = {tr.J} the estimated probability outside the truncation is "
            f"{worst:.3g} > tol = {tol:g}", TruncationWarning, stacklevel=2)
    if times is not None and lost is None:  # max_pairs fixed and the start outside: refuse
        raise ValueError(f"the start state {tra.start} is outside the truncation J = {tr.J}")
    return _result(model, st, tr, tra, freqs, times)


def _result(model: Model, st: _Stationary, tr: _Truncation, tra: _Transient,
            freqs: np.ndarray | None, times: np.ndarray | None) -> ExactResult:
    """Assemble the :class:`ExactResult` of a solved stationary law and transient."""
    lost = tra.lost
    space = st.space
    mean, cov = _moments(space.states, st.pi)
    t_mean = t_var = t_out_var = None
    if times is not None:
        t_mean, t_var = _transient_moments(tra.P, space.states)
        if model.has_sublevels:  # the output species' sums need their own variances
            t_out_var = _transient_moments(tra.P, model.project(space.states.astype(float)))[1]
    return ExactResult(
        species=tuple(model.species), states=space.states, probability=st.pi, mean=mean,
        var=np.diag(cov).copy(), covariance=cov, mass_outside=float(st.mass_outside),
        outflow_rate=float(st.pi @ st.outflow), n_states=space.n_states, max_pairs=tr.J,
        residual=float(st.residual), freqs=freqs, times=times,
        x0=None if tra.start is None else np.asarray(tra.start, dtype=np.int64),
        transient_mean=t_mean, transient_var=t_var, transient_mass_lost=lost,
        transient_output_var=t_out_var, _generator=st.generator, _support=st.support, **_spectra(model, st, freqs),
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
