"""Continuum answers: rate equations, steady state, transient, linear-noise covariance and spectra.

Everything here is computed from the laws a :class:`~grmc.model.Model` carries: the
stoichiometry ``model.stoich``, the macroscopic rate laws (the product-of-factors tables
``model.coefficient``, ``model.factor_*`` with the macroscopic offsets, i.e. what
``model.rates`` and ``model.rate_jacobian`` evaluate), the charge weights and the capacities.
No channel's physics is written down again in this module; the Shockley-Read-Hall helpers at
the end are the textbook formulas the model is *checked* against.

Two numerical points shape the implementation:

* Conservation.  Every channel keeps the charge ``w @ x`` (``w = model.charge_weights``), so
  the Jacobian of the rate equations is singular.  One species per conservation law (holes
  first) is eliminated, ``x = x* + P y`` with ``y`` the independent species; the steady state
  imposes the conservation law as an equation and the linear-noise covariance is solved on the
  reduced system, then mapped back through ``P``.  Species that no channel changes (a trap
  level with ``T_k = 0``) are frozen: their variance is zero.
* Dynamic range.  Counts range from 1e-20 (a minority carrier in a small, heavily doped
  volume) to 1e20.  The steady state is solved in log variables for carriers and logit
  variables for trap occupancies, with the number of empty traps ``T_k - M_k`` carried as its
  own quantity, so that a level that is full to within one part in 1e16 still gives its
  emission rates correctly.  Each species' balance is written as ``log(production) -
  log(loss) = 0``, which is scale free.  The returned counts hold ``M_k`` only (a full level's
  ``T_k - M_k`` may then round to zero in ``model.rates``); ``lna(model)`` without ``x`` uses
  the internal, exact representation.

References
----------
N. G. van Kampen, *Stochastic Processes in Physics and Chemistry*, 3rd ed. (Elsevier, 2007),
ch. X (the system-size expansion and the linear-noise approximation).
W. Shockley and W. T. Read, "Statistics of the recombinations of holes and electrons",
Phys. Rev. 87, 835 (1952).  R. N. Hall, "Electron-hole recombination in germanium",
Phys. Rev. 87, 387 (1952).
K. M. van Vliet, "Noise in semiconductors and photoconductors", Proc. IRE 46, 1004 (1958)
(citation from memory).
R. H. Bartels and G. W. Stewart, "Solution of the matrix equation AX + XB = C",
Commun. ACM 15, 820 (1972) (the Lyapunov solver behind scipy; citation from memory).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Literal, NamedTuple

import numpy as np
import scipy.linalg
from scipy.integrate import solve_ivp
from scipy.optimize import brentq
from scipy.special import expit, log_expit

from .model import BOLTZMANN_EV_K, Model, with_light_off
from .scenario import Material, Trap

__all__ = [
    "ContinuumError",
    "channel_psd",
    "LNAResult",
    "equilibrium",
    "FluxLNA",
    "flux_lna",
    "lna",
    "lna_covariance",
    "lna_psd",
    "low_injection_lifetime",
    "srh_lifetimes",
    "srh_rate",
    "steady_state",
    "total_event_rate",
    "transient",
    "trap_n1_p1",
]

ELECTRONS, HOLES = 0, 1

#: Newton tolerances on the scaled residuals: species balance log(P/L) [1] and conservation
#: laws relative to the magnitude of their terms [1].
_TOL_BALANCE = 1e-11
_TOL_LAW = 1e-13
#: What is still accepted when rounding stops the Newton iteration earlier.
_ACCEPT_BALANCE = 1e-9
_ACCEPT_LAW = 1e-11
#: Largest Newton step in log / logit variables (a factor e^20 in a count).
_MAX_STEP = 20.0


_UNRESOLVED = (
    "the relaxation rates span more than double precision resolves (the slowest is lost in "
    "the rounding of the fastest, a ratio above about 1e15): no linear-noise answer"
)


class ContinuumError(RuntimeError):
    """The continuum problem has no (stable) answer or the solver did not find it."""


# --------------------------------------------------------------------------------------------
# Structure: which species move, which laws are conserved, how the system is reduced
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Structure:
    active: np.ndarray  # species some channel changes
    laws: np.ndarray  # (c, species): row 0 the charge weights, then any further laws
    independent: np.ndarray  # species kept in the reduced system
    dependent: np.ndarray  # species eliminated through the laws
    projection: np.ndarray  # (species, r): x - x* = P y on the conserved manifold


def _structure(model: Model) -> _Structure:
    nu = np.asarray(model.stoich)
    n_s = model.n_species
    w = np.asarray(model.charge_weights, dtype=np.float64)
    if nu.size and np.any(nu @ np.asarray(model.charge_weights) != 0):
        raise ContinuumError("a channel of the model does not keep the charge")
    active = np.flatnonzero(np.any(nu != 0, axis=0)) if nu.size else np.zeros(0, np.int64)
    nu_a = nu[:, active].astype(np.float64)
    rank = int(np.linalg.matrix_rank(nu_a)) if active.size else 0
    n_laws = active.size - rank
    laws = np.zeros((n_laws, n_s))
    if n_laws:
        laws[0] = w
    if n_laws > 1:  # further laws (no pair channel, traps that capture only one carrier)
        null = scipy.linalg.null_space(nu_a)
        wa = w[active]
        null = null - np.outer(wa, wa @ null) / (wa @ wa)
        u = np.linalg.svd(null, full_matrices=False)[0]
        laws[1:, active] = u[:, : n_laws - 1].T
    order = [s for s in (HOLES, ELECTRONS, *range(2, n_s)) if s in set(active.tolist())]
    dep: list[int] = []
    for s in order:
        if len(dep) == n_laws:
            break
        if np.linalg.matrix_rank(laws[:, dep + [s]]) == len(dep) + 1:
            dep.append(s)
    dependent = np.array(sorted(dep), dtype=np.int64)
    independent = np.array([s for s in active if s not in dep], dtype=np.int64)
    proj = np.zeros((n_s, independent.size))
    proj[independent, np.arange(independent.size)] = 1.0
    if n_laws:
        proj[dependent] = -np.linalg.solve(laws[:, dependent], laws[:, independent])
    return _Structure(active, laws, independent, dependent, proj)


# --------------------------------------------------------------------------------------------
# The model's laws, evaluated with the number of empty traps kept exactly
# --------------------------------------------------------------------------------------------


class _Laws:
    """The model's macroscopic laws ``k_r prod_f (sign_f x[s_f] + offset_f)``.

    A factor ``T_k - M_k`` (sign -1, offset = capacity) takes the separately carried number of
    empty traps; a factor ``x_s`` takes ``x_s``; any other factor is evaluated as written.
    """

    def __init__(self, model: Model):
        self.model = model
        self.cap = np.asarray(model.capacity, dtype=np.float64)
        self.nu = np.asarray(model.stoich, dtype=np.float64)
        fs = np.asarray(model.factor_species)
        self.used = fs >= 0
        self.sp = np.maximum(fs, 0)
        self.sign = np.asarray(model.factor_sign)
        self.off = np.asarray(model.factor_offset_macro)
        capf = self.cap[self.sp]
        self.comp = self.used & (self.sign < 0) & (capf > 0) & (self.off == capf)
        self.plain = self.used & (self.sign > 0) & (self.off == 0.0)
        self.general = self.used & ~self.comp & ~self.plain
        self.coef = np.asarray(model.coefficient, dtype=np.float64)

    def _values(self, x: np.ndarray, empty: np.ndarray) -> np.ndarray:
        v = np.where(self.plain, x[self.sp], 1.0)
        v = np.where(self.comp, empty[self.sp], v)
        return np.where(self.general, self.sign * x[self.sp] + self.off, v)

    def rates(self, x: np.ndarray, empty: np.ndarray) -> np.ndarray:
        """w_r [events/s]."""
        return self.coef * np.prod(self._values(x, empty), axis=1)

    def rate_jacobian(self, x: np.ndarray, empty: np.ndarray) -> np.ndarray:
        """d w_r / d x_s [s^-1], shape (channels, species)."""
        v = self._values(x, empty)
        jac = np.zeros((self.coef.size, self.cap.size))
        rows = np.arange(self.coef.size)
        for f in range(v.shape[1]):
            others = np.prod(np.delete(v, f, axis=1), axis=1)
            m = self.used[:, f]
            np.add.at(jac, (rows[m], self.sp[m, f]), (self.coef * self.sign[:, f] * others)[m])
        return jac


def _empty_of(model: Model, x: np.ndarray) -> np.ndarray:
    cap = np.asarray(model.capacity, dtype=np.float64)
    return np.where(cap > 0, cap - x, 0.0)


class _Balance(NamedTuple):
    log_prod: np.ndarray  # log of each active species' production [log events/s]
    log_loss: np.ndarray  # log of its loss
    d_prod: np.ndarray  # d log_prod / dz, (active, active)
    d_loss: np.ndarray
    x: np.ndarray  # counts, all species
    empty: np.ndarray  # empty traps, all species (0 for carriers)
    log_dxdz: np.ndarray  # log(dx/dz) of the active species
    d_log_dxdz: np.ndarray  # its derivative by the same species' z
    log_rates: np.ndarray  # log w_r


class _System:
    """Steady-state equations in z: log count of a carrier, logit occupancy log(M/E) of a trap.

    Unknowns are the active species; frozen ones keep ``x_fixed``.  Equations: each active
    species' ``log(production) - log(loss)`` and each conservation law relative to the
    magnitude of its terms.  The system is overdetermined by the number of laws (one balance
    per law is implied by the others) and consistent at the solution; keeping every balance
    holds the minority carriers' accuracy, which an eliminated equation would lose.
    """

    def __init__(self, model: Model, st: _Structure, x_fixed: np.ndarray, targets: np.ndarray):
        self.laws = _Laws(model)
        self.active = st.active
        cap = self.laws.cap
        self.trap = cap[self.active] > 0
        self.T = np.where(self.trap, cap[self.active], 1.0)
        self.logT = np.log(self.T)
        self.x_fixed = x_fixed
        self.targets = targets
        self.L = st.laws
        pos = np.full(cap.size, -1)
        pos[self.active] = np.arange(self.active.size)
        self.fpos = np.where(self.laws.used, pos[self.laws.sp], -1)
        nu_a = self.laws.nu[:, self.active]
        self.prod_mask, self.loss_mask = nu_a > 0, nu_a < 0
        with np.errstate(divide="ignore"):
            self.lognu = np.log(np.abs(nu_a))
        self.logk = np.log(self.laws.coef)

    def check_balance_possible(self, model: Model) -> None:
        for j, s in enumerate(self.active):
            made, lost = self.prod_mask[:, j].any(), self.loss_mask[:, j].any()
            if not (made and lost):
                what, never = ("produced", "lost") if made else ("lost", "produced")
                raise ContinuumError(
                    f"{model.species[s]} are {what} by some channel but never {never}: "
                    "there is no steady state"
                )

    def balance(self, z: np.ndarray) -> _Balance:
        lw = self.laws
        a, t = self.active, self.trap
        n = lw.cap.size
        # counts, empty traps, their logs and d log / dz (zero for frozen species)
        x = self.x_fixed.copy()
        empty = _empty_of(lw.model, x)
        with np.errstate(divide="ignore", invalid="ignore"):
            lx, le = np.log(x), np.log(empty)
        dlx, dle = np.zeros(n), np.zeros(n)
        zt = z[t]
        lx[a[~t]] = z[~t]
        dlx[a[~t]] = 1.0
        x[a[~t]] = np.exp(z[~t])
        lx[a[t]] = self.logT[t] + log_expit(zt)
        le[a[t]] = self.logT[t] + log_expit(-zt)
        dlx[a[t]] = expit(-zt)
        dle[a[t]] = -expit(zt)
        x[a[t]] = self.T[t] * expit(zt)  # never above T_k
        empty[a[t]] = self.T[t] * expit(-zt)
        # log of each factor of each law and its derivative by z
        sp = lw.sp
        with np.errstate(divide="ignore", invalid="ignore"):
            v_gen = lw.sign * x[sp] + lw.off
            logv = np.where(lw.plain, lx[sp], 0.0)
            logv = np.where(lw.comp, le[sp], logv)
            logv = np.where(lw.general, np.log(v_gen), logv)
            d = np.where(lw.plain, dlx[sp], 0.0)
            d = np.where(lw.comp, dle[sp], d)
            d = np.where(lw.general, lw.sign * (x * dlx)[sp] / v_gen, d)
        d = np.where(self.fpos >= 0, d, 0.0)
        logw = self.logk + logv.sum(axis=1)
        n_r = lw.coef.size
        dlogw = np.zeros((n_r, a.size))
        rows = np.arange(n_r)
        for f in range(self.fpos.shape[1]):
            m = self.fpos[:, f] >= 0
            np.add.at(dlogw, (rows[m], self.fpos[m, f]), d[m, f])
        # production and loss as log-sum-exp over channels, with softmax derivatives
        terms = logw[:, None] + self.lognu
        sums = []
        for mask in (self.prod_mask, self.loss_mask):
            tm = np.where(mask, terms, -np.inf)
            top = tm.max(axis=0)
            top = np.where(np.isfinite(top), top, 0.0)
            p = np.exp(tm - top)
            tot = p.sum(axis=0)
            with np.errstate(divide="ignore"):
                logs = top + np.log(tot)
            p = p / np.where(tot > 0, tot, 1.0)
            sums.append((logs, p.T @ dlogw))
        (log_prod, d_prod), (log_loss, d_loss) = sums
        # dx/dz: x for a carrier, M E / T for a trap
        log_dxdz = np.where(t, lx[a] + le[a] - self.logT, lx[a])
        d_log_dxdz = np.where(t, dlx[a] + dle[a], 1.0)
        return _Balance(log_prod, log_loss, d_prod, d_loss, x, empty, log_dxdz, d_log_dxdz,
                        logw)

    def residual(self, z: np.ndarray, scale: np.ndarray | None = None):
        """Scaled residual, its Jacobian by z, and the conservation scales used."""
        b = self.balance(z)
        g = self.L @ b.x - self.targets
        if scale is None:
            scale = np.abs(self.L) @ np.abs(b.x) + np.abs(self.targets) + 1e-300
        dxdz = np.exp(b.log_dxdz)
        res = np.concatenate([b.log_prod - b.log_loss, g / scale])
        jac = np.vstack([b.d_prod - b.d_loss, self.L[:, self.active] * dxdz / scale[:, None]])
        return res, jac, scale

    def sizes(self, res: np.ndarray) -> tuple[float, float]:
        """Largest balance error and largest conservation error [1]."""
        n_a = self.active.size
        bal = float(np.max(np.abs(res[:n_a]), initial=0.0))
        law = float(np.max(np.abs(res[n_a:]), initial=0.0))
        return bal, law


def _step(jac: np.ndarray, res: np.ndarray) -> np.ndarray:
    """Gauss-Newton step, Levenberg-Marquardt damped so that no |dz| exceeds ``_MAX_STEP``."""
    u, sv, vt = np.linalg.svd(jac, full_matrices=False)
    ur = u.T @ res
    keep = sv > sv[0] * 1e-14 if sv.size else sv > 0

    def step(mu: float) -> np.ndarray:
        return -vt.T @ np.where(keep, sv * ur / (sv * sv + mu), 0.0)

    dz = step(0.0)
    if np.max(np.abs(dz), initial=0.0) <= _MAX_STEP:
        return dz
    lo, hi = -30.0, 30.0  # damping mu = sv[0]^2 10^k: bisect on k
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if np.max(np.abs(step(sv[0] ** 2 * 10.0**mid))) > _MAX_STEP:
            lo = mid
        else:
            hi = mid
    return step(sv[0] ** 2 * 10.0**hi)


def _newton(sys: _System, z: np.ndarray, *, maxiter: int = 200) -> tuple[np.ndarray, bool]:
    """Damped Gauss-Newton on the (consistent, overdetermined) balance + conservation system.

    Steps are Levenberg-Marquardt damped to at most ``_MAX_STEP`` in any z, then shortened
    by backtracking until the squared residual (with the conservation scales of the current
    iterate) decreases by the Armijo rule.
    """
    for _ in range(maxiter):
        res, jac, scale = sys.residual(z)
        if not np.all(np.isfinite(res)):
            return z, False
        bal, law = sys.sizes(res)
        if bal <= _TOL_BALANCE and law <= _TOL_LAW:
            return z, True
        step = _step(jac, res)
        phi0 = float(res @ res)
        slope = 2.0 * float(res @ (jac @ step))  # d phi / d alpha at alpha = 0, < 0
        alpha = 1.0
        while alpha > 1e-12 and slope < 0.0:
            znew = z + alpha * step
            rnew = sys.residual(znew, scale)[0]
            phi = float(rnew @ rnew)
            if np.isfinite(phi) and phi <= phi0 + 1e-4 * alpha * slope:
                break
            alpha *= 0.5
        else:  # no decrease: at the rounding floor, or stuck
            return z, bal <= _ACCEPT_BALANCE and law <= _ACCEPT_LAW
        z = znew
    bal, law = sys.sizes(sys.residual(z)[0])
    return z, bal <= _ACCEPT_BALANCE and law <= _ACCEPT_LAW


class _Budget(Exception):
    """Raised inside the integration when its evaluation budget is spent."""


def _relax(sys: _System, z: np.ndarray, *, max_evals: int = 20_000) -> np.ndarray:
    """Integrate the rate equations in z (stiff, BDF) until every balance is within 1e-3.

    ``dz_s/dt = (P_s - L_s) / (dx_s/dz_s)``; the fallback when Newton from the dark
    equilibrium does not converge.  Near a steady state the right-hand side is a difference of
    large rates and its rounding limits the step size, so the integration stops as soon as the
    balances are within 1e-3, or after ``max_evals`` evaluations, and returns the last state.
    """
    seen = {"z": z, "evals": 0}

    def balance_error(zz) -> float:
        b = sys.balance(zz)
        return float(np.max(np.abs(b.log_prod - b.log_loss), initial=0.0))

    def parts(zz):
        seen["z"], seen["evals"] = zz, seen["evals"] + 1
        if seen["evals"] > max_evals:
            raise _Budget
        b = sys.balance(zz)
        up = np.exp(np.minimum(b.log_prod - b.log_dxdz, 700.0))
        down = np.exp(np.minimum(b.log_loss - b.log_dxdz, 700.0))
        return b, up, down

    def fun(_t, zz):
        _, up, down = parts(zz)
        return up - down

    def jac(_t, zz):
        b, up, down = parts(zz)
        dg = np.diag(b.d_log_dxdz)
        return up[:, None] * (b.d_prod - dg) - down[:, None] * (b.d_loss - dg)

    def done(_t, zz):
        return balance_error(zz) - 1e-3

    done.terminal = True
    if balance_error(z) <= 1e-3:
        return z
    b = sys.balance(z)
    horizon = 1e6 * float(np.max(np.exp(b.log_dxdz - np.maximum(b.log_prod, b.log_loss))))
    if not (np.isfinite(horizon) and horizon > 0):
        horizon = 1.0
    try:
        for _ in range(6):
            sol = solve_ivp(fun, (0.0, horizon), z, method="BDF", jac=jac, events=done,
                            rtol=1e-6, atol=1e-8)
            z = sol.y[:, -1]
            if sol.status == 1 or not sol.success:
                break
            horizon *= 1e3
    except _Budget:
        z = seen["z"]
    return z


# --------------------------------------------------------------------------------------------
# Start values
# --------------------------------------------------------------------------------------------


def _dark_guess(model: Model) -> tuple[np.ndarray, np.ndarray]:
    """Mass action ``N_e N_h = (n_i V)^2`` with each trap level in balance with the carriers.

    Each trap level's occupancy given the carriers is found from the model's drift, which is
    affine in the level's own occupancy; the charge then fixes ``N_e`` (a monotone 1-D root).
    """
    n_s = model.n_species
    cap = np.asarray(model.capacity, dtype=np.float64)
    vol = model.volume_cm3
    k_mass = (model.scenario.material.intrinsic_density_cm3 * vol) ** 2
    traps = np.flatnonzero(cap > 0)
    charge = float(model.charge)

    def state(log_ne: float) -> tuple[np.ndarray, np.ndarray]:
        x = np.zeros(n_s)
        x[ELECTRONS] = math.exp(log_ne)
        x[HOLES] = k_mass * math.exp(-log_ne)
        empty = _empty_of(model, x)
        if traps.size:
            full = x.copy()
            full[traps] = cap[traps]
            d0 = model.drift(x)[traps]  # >= 0: filling rate of empty levels
            d1 = -model.drift(full)[traps]  # >= 0: emptying rate of full levels
            tot = d0 + d1
            frac = np.where(tot > 0, d0 / np.where(tot > 0, tot, 1.0), 0.5)
            efrac = np.where(tot > 0, d1 / np.where(tot > 0, tot, 1.0), 0.5)
            x[traps] = cap[traps] * frac
            empty[traps] = cap[traps] * efrac
        return x, empty

    def excess(log_ne: float) -> float:
        return model.charge_of(state(log_ne)[0]) - charge

    upper = abs(charge) + float(cap[traps].sum()) + math.sqrt(k_mass) + 1.0
    lo, hi = math.log(k_mass / upper), math.log(upper)
    root = brentq(excess, lo, hi, xtol=1e-14, rtol=4 * np.finfo(float).eps, maxiter=500)
    return state(root)


def _z_of(sys: _System, x: np.ndarray, empty: np.ndarray) -> np.ndarray:
    a = sys.active
    tiny = 1e-300
    z = np.log(np.maximum(x[a], tiny))
    t = sys.trap
    z[t] = np.log(np.maximum(x[a][t], tiny)) - np.log(np.maximum(empty[a][t], tiny))
    return z


def _setup(model: Model, x0) -> tuple[_System, np.ndarray]:
    st = _structure(model)
    gx, ge = _dark_guess(model)
    cap = np.asarray(model.capacity, dtype=np.float64)
    if x0 is None:
        sx, se = gx, ge
    else:
        x0 = np.asarray(x0, dtype=np.float64)
        if x0.shape != (model.n_species,):
            raise ValueError(f"x0 must have shape ({model.n_species},), got {x0.shape}")
        inside = np.where(cap > 0, (x0 > 0) & (x0 < cap), x0 > 0)
        sx = np.where(inside, x0, gx)
        se = np.where(inside, _empty_of(model, sx), ge)
    x_fixed = sx.copy()
    x_fixed[cap == 0] = 0.0
    targets = st.laws @ x_fixed
    if st.laws.shape[0]:
        targets[0] = float(model.charge)
    sys = _System(model, st, x_fixed, targets)
    return sys, _z_of(sys, sx, se)


def _solve(model: Model, x0=None) -> tuple[np.ndarray, np.ndarray]:
    """Steady state as (counts, empty traps)."""
    sys, z = _setup(model, x0)
    if sys.active.size == 0:
        x = sys.x_fixed.copy()
        return x, _empty_of(model, x)
    sys.check_balance_possible(model)
    z1, ok = _newton(sys, z)
    if not ok:
        z1, ok = _newton(sys, _relax(sys, z))
    if not ok:
        res = sys.residual(z1)[0]
        bal, law = sys.sizes(res)
        raise ContinuumError(
            f"steady state not found: largest balance error log(P/L) = {bal:.3g}, "
            f"conservation error {law:.3g} (relative)"
        )
    b = sys.balance(z1)
    drift = np.exp(b.log_prod) - np.exp(b.log_loss)
    worst = float(np.max(np.abs(drift))) / float(np.exp(b.log_rates.max()))
    if not worst <= 1e-8:
        raise ContinuumError(f"steady-state drift {worst:.3g} of the largest channel rate")
    return b.x, b.empty


# --------------------------------------------------------------------------------------------
# Public: steady state and transient
# --------------------------------------------------------------------------------------------


def steady_state(
    model: Model, *, x0: np.ndarray | None = None, with_empty: bool = False
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Continuum steady state of the rate equations under the charge constraint.

    Solves ``nu^T w(x) = 0`` with ``charge_weights @ x == model.charge`` and every trap
    occupancy in ``[0, T_k]``.  The start is the dark equilibrium (mass action
    ``N_e N_h = (n_i V)^2`` with every trap level in balance) or ``x0``; a damped Gauss-Newton
    iteration in log (carriers) and logit (traps) variables finishes, with a stiff integration
    of the rate equations as fallback.

    Parameters
    ----------
    model : Model
    x0 : array_like, shape (species,), optional
        Start state [count].  Entries outside the open range (0, T_k) (carriers: > 0) are
        replaced by the dark equilibrium.  Where conservation laws beyond the charge exist
        (no pair channel and trap levels that each capture one carrier only), their values
        are taken from ``x0`` (else from the dark equilibrium).
    with_empty : bool
        Also return the number of empty traps ``T_k - M_k`` as solved (exact even where it
        is below the resolution of ``M_k``; zero for carriers).

    Returns
    -------
    x : ndarray, shape (species,)
        Mean counts [count].  Species no channel changes keep their start value (trap levels
        with ``T_k = 0``: zero).
    empty : ndarray, shape (species,)
        Only with ``with_empty``: empty traps of each level [count].

    Raises
    ------
    ContinuumError
        No steady state exists (a species is produced but never lost, e.g. light without any
        recombination path) or the solver failed; the message gives the residuals.

    Notes
    -----
    The equations are, for every species s that some channel changes,
    ``log P_s(x) - log L_s(x) = 0`` with ``P_s = sum_{nu_rs > 0} nu_rs w_r`` and
    ``L_s = sum_{nu_rs < 0} |nu_rs| w_r``, plus each conservation law relative to the size of
    its terms.  Convergence means production and loss agree to 1e-11 and the laws hold to
    1e-13 (accepted down to 1e-9 and 1e-11 where rounding stops the iteration); the drift is
    then verified to be below 1e-8 of the largest channel rate.
    """
    x, empty = _solve(model, x0)
    return (x, empty) if with_empty else x


def equilibrium(model: Model) -> np.ndarray:
    """Dark steady state (thermal equilibrium) of the model [count].

    With a ``[reservoir]`` whose density differs from the volume's own equilibrium density
    this is the dark steady state the exchange sets, not thermal equilibrium.

    Parameters
    ----------
    model : Model

    Returns
    -------
    ndarray, shape (species,)
        The steady state of :func:`grmc.model.with_light_off` applied to ``model`` [count].
    """
    return steady_state(with_light_off(model))


def transient(
    model: Model,
    x0: np.ndarray,
    t: np.ndarray,
    *,
    rtol: float = 1e-9,
    method: Literal["BDF", "Radau", "LSODA"] = "BDF",
) -> np.ndarray:
    """Solve the rate equations ``dx/dt = nu^T w(x)`` from ``x0`` at ``t = 0``.

    Parameters
    ----------
    model : Model
    x0 : array_like, shape (species,)
        Mean counts at t = 0 [count].
    t : array_like, shape (n,)
        Output times, ascending, >= 0 [s].
    rtol : float
        Relative tolerance of the stiff solver [1].
    method : {"BDF", "Radau", "LSODA"}
        Implicit solver of :func:`scipy.integrate.solve_ivp`.

    Returns
    -------
    ndarray, shape (n, species)
        Mean counts at the times ``t`` [count].

    Raises
    ------
    ContinuumError
        When the integration fails.

    Notes
    -----
    The absolute tolerance of each species is ``1e-3 rtol`` times its scale, the larger of
    its start value and its steady-state value (when a steady state exists), so counts far
    below one are followed with the same relative accuracy as large ones.
    """
    x0 = np.asarray(x0, dtype=np.float64)
    t = np.asarray(t, dtype=np.float64)
    if x0.shape != (model.n_species,):
        raise ValueError(f"x0 must have shape ({model.n_species},), got {x0.shape}")
    if t.ndim != 1 or t.size == 0 or np.any(t < 0) or np.any(np.diff(t) < 0):
        raise ValueError("t must be a non-empty, ascending 1-D array of times >= 0")
    if t[-1] == 0.0 or model.n_channels == 0:
        return np.tile(x0, (t.size, 1))
    scale = np.abs(x0)
    try:
        scale = np.maximum(scale, np.abs(steady_state(model)))
    except ContinuumError:
        pass
    scale = np.maximum(scale, 1e-30 * max(float(scale.max()), 1e-270))
    nu = np.asarray(model.stoich, dtype=np.float64)
    sol = solve_ivp(
        lambda _t, y: model.drift(y),
        (0.0, float(t[-1])),
        x0,
        method=method,
        t_eval=t,
        rtol=rtol,
        atol=1e-3 * rtol * scale,
        jac=lambda _t, y: nu.T @ model.rate_jacobian(y),
    )
    if not sol.success:
        raise ContinuumError(f"rate-equation integration failed: {sol.message}")
    out = sol.y.T.copy()
    out[t == 0.0] = x0  # the start state itself, not the integrator's interpolant
    return out


# --------------------------------------------------------------------------------------------
# Linear-noise approximation
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LNAResult:
    """Linear-noise approximation about one state.

    Attributes
    ----------
    species : tuple of str
    mean : ndarray, shape (species,)  State expanded about (the steady state by default) [count]
    jacobian : ndarray, shape (species, species)  A = nu^T dw/dx [s^-1]
    diffusion : ndarray, shape (species, species)  D = sum_r nu_r nu_r^T w_r [count^2/s]
    covariance : ndarray, shape (species, species)  Stationary covariance [count^2]
    relaxation_times : ndarray  -1/Re(lambda) of the reduced Jacobian, descending [s]
    independent : ndarray of int  Species kept in the reduced system
    dependent : ndarray of int  Species eliminated through the conservation laws
    projection : ndarray, shape (species, r)  P with x - mean = P y (y: independent
        species); rows of frozen species are zero [1]
    reduced_jacobian : ndarray, shape (r, r)  A_r = A[independent] P [s^-1]
    reduced_diffusion : ndarray, shape (r, r)  D_r = D[independent][:, independent]
        [count^2/s]
    """

    species: tuple[str, ...]
    mean: np.ndarray
    jacobian: np.ndarray
    diffusion: np.ndarray
    covariance: np.ndarray
    relaxation_times: np.ndarray
    independent: np.ndarray
    dependent: np.ndarray
    projection: np.ndarray
    reduced_jacobian: np.ndarray
    reduced_diffusion: np.ndarray

    @property
    def variance(self) -> np.ndarray:
        """Diagonal of the covariance [count^2]."""
        return np.diag(self.covariance).copy()


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a)
    a.setflags(write=False)
    return a


def lna(
    model: Model, x: np.ndarray | None = None, *, empty: np.ndarray | None = None
) -> LNAResult:
    """Linear-noise approximation (van Kampen's system-size expansion) about a state.

    Parameters
    ----------
    model : Model
    x : array_like, shape (species,), optional
        State to expand about [count]; default the continuum steady state (then the number of
        empty traps is taken exactly from the solver, see the module notes).
    empty : array_like, shape (species,), optional
        Empty traps ``T_k - M_k`` to use with ``x`` [count] (e.g. from
        ``steady_state(model, with_empty=True)``); default ``T_k - x``.

    Returns
    -------
    LNAResult

    Raises
    ------
    ContinuumError
        When the reduced Jacobian is not stable (an eigenvalue with Re > 0: no stationary
        covariance exists), or when its slowest relaxation rate is below the rounding of the
        fastest (rates more than about 1e15 apart: the covariance cannot be resolved).

    Notes
    -----
    With ``A = nu^T dw/dx`` and ``D = nu^T diag(w) nu``, the covariance solves
    ``A S + S A^T + D = 0`` (van Kampen, ch. X).  Every channel keeps the charge, so ``A`` is
    singular; the equation is solved on the reduced system ``A_r S_r + S_r A_r^T + D_r = 0``
    (holes eliminated, ``N_h = N_e + sum_k M_k - charge``) and mapped back,
    ``S = P S_r P^T``; hence ``var(N_e) == var(N_h)`` where only pair channels act.
    The Schur-based solver resolves a mode of rate ``lambda`` to about
    ``eps max|lambda_j| / |lambda|`` relative (``eps`` = 2.2e-16).

    References
    ----------
    N. G. van Kampen, Stochastic Processes in Physics and Chemistry, 3rd ed. (Elsevier, 2007).
    """
    st = _structure(model)
    laws = _Laws(model)
    if x is None:
        x, empty = _solve(model)
    else:
        x = np.asarray(x, dtype=np.float64)
        if x.shape != (model.n_species,):
            raise ValueError(f"x must have shape ({model.n_species},), got {x.shape}")
        if empty is None:
            empty = _empty_of(model, x)
        else:
            empty = np.where(laws.cap > 0, np.asarray(empty, dtype=np.float64), 0.0)
    w = laws.rates(x, empty)
    nu = laws.nu
    amat = nu.T @ laws.rate_jacobian(x, empty)
    dmat = (nu.T * w) @ nu
    ind, proj = st.independent, st.projection
    a_r = amat[ind] @ proj
    d_r = dmat[np.ix_(ind, ind)]
    n_s = model.n_species
    if ind.size == 0:
        cov = np.zeros((n_s, n_s))
        taus = np.zeros(0)
    else:
        eig = np.linalg.eigvals(a_r)
        top = float(eig.real.max())
        if top > 1e-12 * float(np.abs(a_r).sum(axis=1).max()):
            raise ContinuumError(
                f"the reduced Jacobian has an eigenvalue with Re = {top:.3g} 1/s > 0: the "
                "state is not a stable steady state, no stationary covariance"
            )
        if top >= 0.0:
            raise ContinuumError(_UNRESOLVED)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            s_r = scipy.linalg.solve_continuous_lyapunov(a_r, -d_r)
        if caught:  # LAPACK had to perturb: lambda_i + lambda_j ~ 0 within rounding
            raise ContinuumError(_UNRESOLVED)
        s_r = 0.5 * (s_r + s_r.T)
        cov = proj @ s_r @ proj.T
        taus = np.sort(-1.0 / eig.real)[::-1]
    return LNAResult(
        species=tuple(model.species),
        mean=_frozen(x),
        jacobian=_frozen(amat),
        diffusion=_frozen(dmat),
        covariance=_frozen(cov),
        relaxation_times=_frozen(taus),
        independent=_frozen(ind),
        dependent=_frozen(st.dependent),
        projection=_frozen(proj),
        reduced_jacobian=_frozen(a_r),
        reduced_diffusion=_frozen(d_r),
    )


def lna_covariance(
    model: Model, x: np.ndarray | None = None, *, empty: np.ndarray | None = None
) -> np.ndarray:
    """Linear-noise covariance of the counts [count^2]; see :func:`lna`."""
    return np.array(lna(model, x, empty=empty).covariance)


def lna_psd(
    model: Model,
    freqs: np.ndarray,
    *,
    x: np.ndarray | None = None,
    empty: np.ndarray | None = None,
) -> np.ndarray:
    """One-sided linear-noise spectral matrix of the counts.

    Parameters
    ----------
    model : Model
    freqs : array_like, shape (n,)
        Frequencies >= 0 [Hz].
    x : array_like, shape (species,), optional
        State to expand about [count]; default the continuum steady state.
    empty : array_like, shape (species,), optional
        Empty traps to use with ``x`` [count]; see :func:`lna`.

    Returns
    -------
    ndarray of complex, shape (species, species, n)
        ``S(f) = 2 (i w - A)^-1 D (-i w - A^T)^-1`` with ``w = 2 pi f``, computed on the reduced
        system and mapped back [count^2/Hz].  The diagonal is the one-sided PSD of each count;
        the off-diagonal entries are cross spectra (e.g. electrons-holes for a current).
        ``integral_0^inf Re S(f) df`` equals the covariance (Parseval).

    Notes
    -----
    For one variable with ``1/tau = r' - g'`` and ``var = g/(r' - g')`` this is van Vliet's
    Lorentzian ``4 var tau / (1 + (2 pi f tau)^2)``.
    """
    res = lna(model, x, empty=empty)
    f = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
    if f.ndim != 1 or np.any(f < 0):
        raise ValueError("freqs must be a 1-D array of frequencies >= 0")
    a_r, d_r, proj = res.reduced_jacobian, res.reduced_diffusion, res.projection
    r = a_r.shape[0]
    n_s = model.n_species
    if r == 0:
        return np.zeros((n_s, n_s, f.size), dtype=np.complex128)
    mats = 2j * np.pi * f[:, None, None] * np.eye(r) - a_r
    y = np.linalg.solve(mats, np.broadcast_to(d_r, mats.shape).astype(np.complex128))
    s = np.conj(np.swapaxes(np.linalg.solve(mats, np.conj(np.swapaxes(y, 1, 2))), 1, 2))
    return 2.0 * np.einsum("ia,fab,jb->ijf", proj, s, proj)


class FluxLNA(NamedTuple):
    """Linear-noise answer for the collected flux ``J = sum_r flow_r dN_r/dt``.

    Attributes
    ----------
    mean : float  ``sum_r flow_r w_r(x)`` [carriers/s] (``q`` times it is the current)
    white : float  High-frequency level ``2 sum_r flow_r^2 w_r`` [s^-1]
    psd : ndarray (F,)  One-sided spectrum [s^-1] (``q^2`` times it is in A^2/Hz)
    """

    mean: float
    white: float
    psd: np.ndarray


def flux_lna(model: Model, freqs: np.ndarray, *, x: np.ndarray | None = None,
             empty: np.ndarray | None = None) -> FluxLNA:
    """Mean, white level and linear-noise spectrum of the collected flux.

    The flux ``J = sum_r flow_r dN_r/dt`` counts crossings of the collecting boundary
    (``model.flow_weight``: +1 out, -1 in).  In the linear-noise approximation each channel
    fires at ``w_r(x) + xi_r`` with white ``xi_r`` of intensity ``w_r`` and
    ``dx/dt = nu^T (w + xi)``, so

        dJ(w) = sum_r g_r(w) xi_r,   g_r(w) = flow_r + phi^T (i w - A)^-1 nu_r,
        S_J(f) = 2 sum_r |g_r(w)|^2 w_r,   phi = sum_r flow_r dw_r/dx

    (van Kampen ch. X; the crossing is the jump itself, the second term the change it makes
    in the later crossing rates).  Channels that move no carrier in the volume (``nu_r = 0``,
    a contact that replaces what it collects) give the shot term ``2 flow_r^2 w_r`` of a
    doubly stochastic Poisson process; pair exchange with a reservoir also correlates each
    crossing with the count it changes.  Exact for first-order networks.  Far above every
    relaxation rate ``S_J`` tends to ``white``: full shot noise of all crossings, ``q^2``
    times it is ``2 q (I_out + I_in)`` (Schottky, Ann. Phys. 57, 541, 1918; for a junction
    at zero bias 4 q I_0, van der Ziel, Noise in Solid State Devices and Circuits, Wiley
    1986, from memory).

    Parameters
    ----------
    model : Model
    freqs : array_like  Frequencies >= 0 [Hz]
    x, empty : optional  Expansion point (and empty traps); default the continuum steady
        state, solved once

    Returns
    -------
    FluxLNA
    """
    if x is None:
        x, empty = _solve(model)
    else:
        x = np.asarray(x, dtype=np.float64)
        empty = _empty_of(model, x) if empty is None else np.asarray(empty, dtype=np.float64)
    laws = _Laws(model)
    flow = np.asarray(model.flow_weight, dtype=np.float64)
    w = laws.rates(x, empty)
    parts = channel_psd(model, freqs, flow=flow, x=x, empty=empty)
    return FluxLNA(mean=float(flow @ w), white=float(2.0 * (flow**2 @ w)),
                   psd=parts.sum(axis=1))


def channel_psd(model: Model, freqs: np.ndarray, gradient: np.ndarray | None = None, *,
                flow: np.ndarray | None = None, x: np.ndarray | None = None,
                empty: np.ndarray | None = None) -> np.ndarray:
    """Linear-noise spectrum of an observable, split into the part each channel's noise drives.

    The observable is ``y = gradient . x + sum_r flow_r dN_r/dt`` (a drift current of the
    counts, a flux of crossings, or both).  Each channel fires at ``w_r + xi_r`` with white
    ``xi_r`` of intensity ``w_r``, so ``dy(w) = sum_r g_r(w) xi_r`` with
    ``g_r(w) = flow_r + gradient^T (i w - A)^-1 nu_r`` and the channels' parts
    ``2 |g_r(w)|^2 w_r`` add up to the one-sided spectrum of ``y`` (van Kampen, Stochastic
    Processes in Physics and Chemistry, 2007, ch. X).

    Parameters
    ----------
    model : Model
    freqs : array_like  Frequencies >= 0 [Hz]
    gradient : array_like (species,), optional  dy/dx [y per count]; default the flux's
        own ``sum_r flow_r dw_r/dx`` (the change a count makes in the later crossing rates)
    flow : array_like (channels,), optional  Weight of each channel's events in y (default 0)
    x, empty : optional  Expansion point (and empty traps); default the continuum steady state

    Returns
    -------
    ndarray (F, channels)  Each channel's part of the one-sided spectrum [y^2/Hz]
    """
    if x is None:
        x, empty = _solve(model)
    else:
        x = np.asarray(x, dtype=np.float64)
        empty = _empty_of(model, x) if empty is None else np.asarray(empty, dtype=np.float64)
    res = lna(model, x, empty=empty)
    laws = _Laws(model)
    n_ch = laws.nu.shape[0]
    flow = np.zeros(n_ch) if flow is None else np.asarray(flow, dtype=np.float64)
    w = laws.rates(x, empty)
    if gradient is None:
        gradient = flow @ laws.rate_jacobian(x, empty)
    f = np.atleast_1d(np.asarray(freqs, dtype=np.float64))
    if f.ndim != 1 or np.any(f < 0):
        raise ValueError("freqs must be a 1-D array of frequencies >= 0")
    a_r, proj, ind = res.reduced_jacobian, res.projection, res.independent
    g = np.broadcast_to(flow.astype(np.complex128), (f.size, n_ch)).copy()
    if ind.size:
        nu_r = laws.nu[:, ind]  # (channels, r)
        mats = 2j * np.pi * f[:, None, None] * np.eye(ind.size) - a_r
        resp = np.linalg.solve(mats, np.broadcast_to(nu_r.T.astype(np.complex128),
                                                     (f.size,) + nu_r.T.shape))
        g += np.einsum("s,sa,far->fr", np.asarray(gradient, dtype=np.float64), proj, resp)
    return 2.0 * np.abs(g) ** 2 * w


# --------------------------------------------------------------------------------------------
# Cost of a run
# --------------------------------------------------------------------------------------------


def drive_response(model: Model, *, channel: int, kind: int, frequency_Hz: float,
                   depth: float) -> tuple[np.ndarray, np.ndarray]:
    """Linear response of the mean counts to a modulated channel, at the drive frequency.

    The channel's rate is ``w_r(x) h(t)`` with ``h = 1 + m sin(w t)`` (kind 1, sine) or
    ``1 +/- m`` by the sign of ``sin(w t)`` (kind 2, square; its fundamental has amplitude
    ``4 m / pi``).  Linearising the rate equations about the steady state (Jacobian A),
    ``dx = Im[H(w) e^{i w t}] w_r a_1`` with ``H(w) = (i w I - A)^-1 nu_r`` and ``a_1`` the
    fundamental's amplitude, so the response at the drive frequency is
    ``amplitude * sin(w t + phase)`` (common practice: the transfer function of a linear
    system driven at one frequency).

    Parameters
    ----------
    model : Model
    channel : int  Index of the modulated channel
    kind : int  1 sine, 2 square
    frequency_Hz : float  Drive frequency f [Hz]
    depth : float  Modulation depth m [1]

    Returns
    -------
    amplitude : ndarray (species,)  [count]
    phase : ndarray (species,)  Phase relative to sin(2 pi f t) [rad], in (-pi, pi]
    """
    res = lna(model)
    w = 2.0 * math.pi * frequency_Hz
    A = np.asarray(res.jacobian, dtype=float)
    nu = model.stoich[channel].astype(float)
    H = np.linalg.solve(1j * w * np.eye(A.shape[0]) - A, nu)
    rate = float(model.rates(res.mean)[channel])
    fundamental = depth if kind == 1 else 4.0 * depth / math.pi
    response = H * rate * fundamental
    return np.abs(response), np.angle(response)


def total_event_rate(
    model: Model, x: np.ndarray, *, law: Literal["exact", "macro"] = "exact"
) -> float:
    """Total event rate of one trajectory [events/s].

    Parameters
    ----------
    model : Model
    x : array_like, shape (species,)
        Mean counts [count].
    law : {"exact", "macro"}
        ``"exact"`` (default): the sum of the exact propensities at the integer neutral state
        nearest to ``x`` (what the event engine pays); ``"macro"``: the sum of the macroscopic
        rate laws at ``x``.

    Returns
    -------
    float
    """
    if law == "exact":
        return float(model.propensities(model.nearest_neutral_state(x)).sum())
    if law == "macro":
        return float(model.rates(x).sum())
    raise ValueError(f"law must be 'exact' or 'macro', got {law!r}")


# --------------------------------------------------------------------------------------------
# Shockley-Read-Hall helpers (textbook formulas, used to check the model)
# --------------------------------------------------------------------------------------------


def trap_n1_p1(trap: Trap, material: Material) -> tuple[float, float]:
    """Shockley-Read densities of a trap level.

    Parameters
    ----------
    trap : Trap
        ``energy_eV`` = E_t - E_i [eV].
    material : Material
        ``intrinsic_density_cm3`` [cm^-3] and ``temperature_K`` [K].

    Returns
    -------
    n1, p1 : float
        ``n_i exp((E_t - E_i)/kT)`` and ``n_i exp(-(E_t - E_i)/kT)`` [cm^-3].

    References
    ----------
    W. Shockley and W. T. Read, Phys. Rev. 87, 835 (1952).
    """
    kt = BOLTZMANN_EV_K * material.temperature_K
    ni = material.intrinsic_density_cm3
    return ni * math.exp(trap.energy_eV / kt), ni * math.exp(-trap.energy_eV / kt)


def srh_lifetimes(trap: Trap, n_traps_cm3: float) -> tuple[float, float]:
    """Shockley-Read-Hall capture time constants.

    Parameters
    ----------
    trap : Trap
        ``electron_capture_cm3_s`` c_n and ``hole_capture_cm3_s`` c_p [cm^3/s].
    n_traps_cm3 : float
        Trap density N_t [cm^-3].

    Returns
    -------
    tau_n0, tau_p0 : float
        ``1/(c_n N_t)`` and ``1/(c_p N_t)`` [s] (infinite where the coefficient is zero).

    References
    ----------
    W. Shockley and W. T. Read, Phys. Rev. 87, 835 (1952); R. N. Hall, Phys. Rev. 87, 387
    (1952).
    """

    def inv(c: float) -> float:
        rate = c * n_traps_cm3
        return 1.0 / rate if rate > 0 else math.inf

    return inv(trap.electron_capture_cm3_s), inv(trap.hole_capture_cm3_s)


def srh_rate(n, p, n_i, n1, p1, tau_n0, tau_p0):
    """Shockley-Read-Hall net recombination rate of one level.

    Parameters
    ----------
    n, p : float or ndarray
        Electron and hole densities [cm^-3].
    n_i : float
        Intrinsic density [cm^-3].
    n1, p1 : float
        Shockley-Read densities of the level (:func:`trap_n1_p1`) [cm^-3].
    tau_n0, tau_p0 : float
        Capture time constants (:func:`srh_lifetimes`) [s].

    Returns
    -------
    float or ndarray
        ``U = (n p - n_i^2) / (tau_p0 (n + n1) + tau_n0 (p + p1))`` [cm^-3 s^-1]; positive for
        net recombination.

    Notes
    -----
    Exact for the steady state of one level's occupancy at given n and p; "many-trap limit"
    refers to neglecting the trapped charge when n and p are set by the doping.

    References
    ----------
    W. Shockley and W. T. Read, Phys. Rev. 87, 835 (1952); R. N. Hall, Phys. Rev. 87, 387
    (1952).
    """
    n = np.asarray(n, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    out = (n * p - n_i * n_i) / (tau_p0 * (n + n1) + tau_n0 * (p + p1))
    return out if out.ndim else float(out)


def low_injection_lifetime(model: Model) -> float:
    """Low-injection Shockley-Read-Hall lifetime of a model with one active trap level [s].

    Parameters
    ----------
    model : Model
        Exactly one trap level with ``T_k > 0``.

    Returns
    -------
    float
        ``tau = (tau_p0 (n0 + n1) + tau_n0 (p0 + p1)) / (n0 + p0)`` with n0, p0 the continuum
        equilibrium densities and ``N_t = T_k / V`` [s]; in p-type material (p0 >> n0, n1, p1)
        this is the minority-electron lifetime ``tau_n0``.  Only the trap level counts:
        radiative and Auger channels are not included.

    Raises
    ------
    ValueError
        When the model has no or several active trap levels.

    Notes
    -----
    The small-signal limit ``U = dn / tau`` of the Shockley-Read-Hall rate (``dn = dp``),
    valid when the trapped charge is negligible (N_t << n0 + p0).

    References
    ----------
    W. Shockley and W. T. Read, Phys. Rev. 87, 835 (1952).
    """
    levels = [k for k, total in enumerate(model.counts.traps) if total > 0]
    if len(levels) != 1:
        raise ValueError(f"needs exactly one trap level with traps, the model has {len(levels)}")
    k = levels[0]
    scen = model.scenario
    trap = scen.traps[k]
    vol = model.volume_cm3
    x_eq = equilibrium(model)
    n0, p0 = x_eq[ELECTRONS] / vol, x_eq[HOLES] / vol
    n1, p1 = trap_n1_p1(trap, scen.material)
    tau_n0, tau_p0 = srh_lifetimes(trap, model.counts.traps[k] / vol)
    return float((tau_p0 * (n0 + n1) + tau_n0 * (p0 + p1)) / (n0 + p0))
