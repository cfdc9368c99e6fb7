"""The plain-Python twin of the compiled event engine (the reference it is tested against).

:func:`simulate` takes the same arguments as :func:`grmc.engine.kernels.simulate` and returns
the identical :class:`~grmc.engine.kernels.TrajectoryResult`, bit for bit: the same random
draws in the same order (the Python twins of the xoshiro256++ generator), and every
floating-point operation the kernel performs in the same order on IEEE doubles (Python
floats), as listed step by step in the notes of :mod:`grmc.engine.kernels`.  It is written
from the model's plain arrays directly (each factor and propensity evaluated from the state,
no shared slots, no incremental slot updates, no tables, a plain linear search), so it also
checks the kernel's table construction and its shortcuts.  Each step of the kernel's event
loop has a function of the same name here (``_total``, ``_draw_channel``, ``_accept``,
``_apply_event``, ``_apply_recorded``, ``_update_propensities``; ``_Recorder.close_bins`` for
``_close_bins``), called in the same order by ``_phase``.  It runs at well under a million events per
second: for tests and small checks only.

References
----------
D. T. Gillespie, "A general method for numerically simulating the stochastic time evolution
of coupled chemical reactions", J. Comput. Phys. 22, 403 (1976).
P. A. W. Lewis and G. S. Shedler, "Simulation of nonhomogeneous Poisson processes by
thinning", Naval Res. Logist. Q. 26, 403 (1979) (the optional modulated channel).
J. M. McCollum et al., "The sorting direct method for stochastic simulation of biochemical
systems with varying reaction execution behavior", Comput. Biol. Chem. 30, 39 (2006).
"""

from __future__ import annotations

import math

import numpy as np

from .tables import SINE, TrajectoryResult, allocate_outputs, validate_inputs, validate_options
from .rng import py_state, py_step, py_store, py_u64_to_double

__all__ = ["simulate"]


class _Model:
    """The plain arrays as Python lists (floats and ints)."""

    def __init__(self, v: dict, mod=None):
        self.n_channels = v["stoich"].shape[0]
        self.n_species = v["x0"].shape[0]
        self.coefficient = [float(c) for c in v["coefficient"]]
        if mod is not None:  # the dominating process: the modulated channel at its bound
            self.coefficient[mod.channel] = self.coefficient[mod.channel] * (1.0 + mod.depth)
        self.factors = []  # per channel: three (species, sign, offset), None where unused
        for r in range(self.n_channels):
            fac = []
            for f in range(3):
                s = int(v["factor_species"][r, f])
                if s >= 0:
                    fac.append((s, float(v["factor_sign"][r, f]),
                                float(v["factor_offset"][r, f])))
                else:
                    fac.append(None)
            self.factors.append(fac)
        self.changes = [[(s, float(v["stoich"][r, s])) for s in range(self.n_species)
                         if v["stoich"][r, s] != 0] for r in range(self.n_channels)]
        ptr, idx = v["dep_indptr"], v["dep_indices"]
        self.dependents = [[int(q) for q in idx[ptr[r]:ptr[r + 1]]]
                           for r in range(self.n_channels)]
        self.n_pad = 4 * max(1, (self.n_channels + 3) // 4)

    def propensity(self, q: int, x: list[float]) -> float:
        """(k * g0) * (g1 * g2) with g = sign * x + offset, 1.0 for an unused factor."""
        g = [1.0 if f is None else f[1] * x[f[0]] + f[2] for f in self.factors[q]]
        return (self.coefficient[q] * g[0]) * (g[1] * g[2])


def _total(a: list[float]) -> float:
    """(P0 + P1) + (P2 + P3) with P_m = ((a[m] + a[m + 4]) + a[m + 8]) + ..."""
    p = a[0:4]
    for i in range(4, len(a), 4):
        for m in range(4):
            p[m] += a[i + m]
    return (p[0] + p[1]) + (p[2] + p[3])


class _Recorder:
    """The window's bins, samples and integrals, in the kernel's operation order."""

    def __init__(self, x, duration_s, n_samples, oversample, out, flow_weight=None):
        self.samples, self.bins, self.integ, self.integ2, self.events = out[:5]
        self.flow_weight = None if flow_weight is None else [float(w) for w in flow_weight]
        self.flows = [0.0] * (n_samples * oversample)
        self.duration_s = duration_s
        self.n_bins = n_samples * oversample
        self.oversample = oversample
        self.n_species = len(x)
        self.last = [0.0] * len(x)
        self.acc = [0.0] * len(x)
        self.acc2 = [0.0] * len(x)
        self.integ_l = [0.0] * len(x)
        self.integ2_l = [0.0] * len(x)
        for s in range(len(x)):
            self.samples[0, s] = int(x[s])
        self.j = 0
        self.bin_start = 0.0
        self.next_edge = duration_s * (1.0 / float(self.n_bins))

    def edge(self, j: int) -> float:
        return self.duration_s * (float(j) / float(self.n_bins))

    def close_bins(self, t_limit: float, x: list[float]) -> None:
        edge = self.edge(self.j + 1)
        while self.j < self.n_bins and edge < t_limit:
            width = edge - self.bin_start
            for s in range(self.n_species):
                xs = x[s]
                dt = edge - self.last[s]
                acc = self.acc[s] + xs * dt
                acc2 = self.acc2[s] + xs * xs * dt
                self.bins[self.j, s] = acc / width
                self.integ_l[s] += acc
                self.integ2_l[s] += acc2
                self.last[s] = edge
                self.acc[s] = 0.0
                self.acc2[s] = 0.0
            self.j += 1
            if self.j < self.n_bins and self.j % self.oversample == 0:
                k = self.j // self.oversample
                for s in range(self.n_species):
                    self.samples[k, s] = int(x[s])
            self.bin_start = edge
            edge = self.edge(self.j + 1)
        self.next_edge = edge

    def change(self, s: int, t: float, x: list[float]) -> None:
        xs = x[s]
        dt = t - self.last[s]
        self.acc[s] += xs * dt
        self.acc2[s] += xs * xs * dt
        self.last[s] = t

    def finish(self, x: list[float]) -> None:
        self.close_bins(math.inf, x)
        self.integ[:] = self.integ_l
        self.integ2[:] = self.integ2_l


def _accept(mod, tw: float, u3: float) -> bool:
    """Step 5a: whether a candidate of the modulated channel at window time tw is kept."""
    sn = math.sin((2.0 * math.pi) * mod.frequency_Hz * tw + mod.phase_rad)
    if mod.kind == SINE:
        h = 1.0 + mod.depth * sn
    else:
        h = 1.0 + mod.depth if sn >= 0.0 else 1.0 - mod.depth
    return u3 * (1.0 + mod.depth) < h


def _draw_channel(a: list[float], order: list[int], target: float) -> int:
    """Step 5: a plain linear search of the running sum, the rounding guard, the swap."""
    n = len(order)
    cum = 0.0
    k = 0
    while k < n:
        cum += a[order[k]]
        if cum > target:
            break
        k += 1
    if k == n:
        k = n - 1
        while k > 0 and a[order[k]] <= 0.0:
            k -= 1
    p = order[k]
    if k > 0:
        order[k], order[k - 1] = order[k - 1], p
    return p


def _apply_event(model: _Model, p: int, x: list[float]) -> None:
    """Step 6 while settling: the change of channel p."""
    for s, d in model.changes[p]:
        x[s] = x[s] + d


def _apply_recorded(model: _Model, p: int, t: float, x: list[float], rec: _Recorder) -> None:
    """Step 6 in the window: integrate each changed species up to t, then change it."""
    for s, d in model.changes[p]:
        rec.change(s, t, x)
        x[s] = x[s] + d


def _update_propensities(model: _Model, p: int, x: list[float], a: list[float]) -> None:
    """Step 7: the dependent channels of p, each evaluated from the state."""
    for q in model.dependents[p]:
        a[q] = model.propensity(q, x)


def _phase(model: _Model, x: list[float], a: list[float], order: list[int], rng: list[int],
           t_end: float, rec: _Recorder | None, mod=None, t_shift: float = 0.0) -> int:
    """One phase (settling when ``rec`` is None); the steps of the kernel's module notes.

    ``mod``: the modulation (or None); ``t_shift``: the window time at this phase's t = 0.
    """
    a0 = _total(a)
    t = 0.0
    n_events = 0
    while a0 > 0.0:                                                     # step 1
        u1 = py_u64_to_double(py_step(rng))                             # step 2
        t_new = t + (-math.log(1.0 - u1) / a0)
        if t_new > t_end:                                               # step 3
            break
        if rec is not None and rec.next_edge < t_new:                   # step 4
            rec.close_bins(t_new, x)
        u2 = py_u64_to_double(py_step(rng))                             # step 5
        p = _draw_channel(a, order, u2 * a0)
        if mod is not None and p == mod.channel:                        # step 5a
            u3 = py_u64_to_double(py_step(rng))
            if not _accept(mod, t_new + t_shift, u3):
                t = t_new
                continue
        t = t_new                                                       # step 6
        n_events += 1
        if rec is not None:
            rec.events[p] += 1
            if rec.flow_weight is not None:
                rec.flows[rec.j] += rec.flow_weight[p]
            _apply_recorded(model, p, t, x, rec)
        else:
            _apply_event(model, p, x)
        _update_propensities(model, p, x, a)                            # step 7
        a0 = _total(a)
    if rec is not None:
        rec.finish(x)
    return n_events


def simulate(stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
             dep_indices, *, x0, rng_state: np.ndarray, settle_s: float = 0.0,
             excess=None, duration_s: float, n_samples: int, oversample: int = 1,
             modulation=None, flow_weight=None) -> TrajectoryResult:
    """Plain-Python twin of :func:`grmc.engine.kernels.simulate` (same arguments, same result).

    Parameters
    ----------
    See :func:`grmc.engine.kernels.simulate`.  ``rng_state`` is advanced in place exactly as
    the kernel advances it.

    Returns
    -------
    TrajectoryResult
    """
    v = validate_inputs(stoich, coefficient, factor_species, factor_sign, factor_offset,
                        dep_indptr, dep_indices, x0=x0, rng_state=rng_state,
                        settle_s=settle_s, excess=excess, duration_s=duration_s,
                        n_samples=n_samples, oversample=oversample)
    mod, fw = validate_options(modulation, flow_weight, v["stoich"].shape[0])
    model = _Model(v, mod)
    out = allocate_outputs(model.n_species, model.n_channels, v["n_samples"], v["oversample"])
    rng = py_state(rng_state)
    x = [float(c) for c in v["x0"]]
    a = [model.propensity(q, x) for q in range(model.n_channels)]
    a += [0.0] * (model.n_pad - model.n_channels)
    # initial search order over the n_pad positions: decreasing propensity, ties by position
    order = sorted(range(model.n_pad), key=lambda q: -a[q])
    if v["settle_s"] > 0.0:
        _phase(model, x, a, order, rng, v["settle_s"], None, mod, -v["settle_s"])
    excess = [int(e) for e in v["excess"]]
    if any(excess):
        for s in range(model.n_species):
            if excess[s] != 0:
                x[s] = x[s] + float(excess[s])
        for q in range(model.n_channels):
            a[q] = model.propensity(q, x)
    rec = _Recorder(x, v["duration_s"], v["n_samples"], v["oversample"], out, fw)
    n_events = _phase(model, x, a, order, rng, v["duration_s"], rec, mod, 0.0)
    out[5][:] = [int(c) for c in x]
    py_store(rng, rng_state)
    flows = np.array(rec.flows if fw is not None else [], dtype=np.float64)
    return TrajectoryResult(*out[:6], n_events, rng_state.copy(), flows)
