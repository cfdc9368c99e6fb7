"""The compiled event engine: Gillespie's direct method with exact time-averaged recording.

One entry point: :func:`simulate` (the wrapper: validates, allocates, returns a
:class:`TrajectoryResult`) calls :func:`run` (the one compiled function: runs one trajectory
in the arrays it is given, never allocates, releases the GIL).  A trajectory settles for
``settle_s`` without recording, adds ``excess`` to the state, and records the window
``[0, duration_s]``: states at the sample times, exact time averages over fine bins, exact
integrals of x and x^2, event counts per channel, optionally the flows, and the final state.
:func:`run` reads the model as one record, :class:`~grmc.engine.tables.KernelTables`, and
its options as another, :class:`~grmc.engine.tables.KernelOptions`, whose "none" values
switch the modulation and the flows off (both built in :mod:`grmc.engine.tables`).

The event loop (:func:`_phase`) is a sequence of small compiled steps: :func:`_total` (a0),
:func:`_draw_channel` (the search), :func:`_accept` (thinning), :func:`_apply_event` /
:func:`_apply_recorded` (the change), :func:`_update_propensities` and :func:`_close_bins`
(recording).  The steps called once per event are inlined by LLVM and :func:`_total`, called
at two places, by numba (``inline="always"``), so the loop runs as one function, as fast as
when it was written out in one piece (``benchmarks/bench_engine.py``).  The plain-Python
twin in :mod:`grmc.engine.oracle` has a function of the same name for each step.

Algorithm (the oracle in ``grmc.engine.oracle`` repeats every step in the same order)
-------------------------------------------------------------------------------------
Factors and propensities: ``g = sign * x[s] + offset`` (a multiply, then an add) and
``a_q = (k_q * g_q0) * (g_q1 * g_q2)``, an unused factor being exactly 1.0.  Signs, offsets
and counts are integers (validated), so every factor is an exact integer in float64.  Equal
factors of different channels (the same species, sign and offset, e.g. ``N_e`` in the
radiative, Auger and capture laws) share one "slot", evaluated once; after an event each
slot of a changed species is updated by adding ``sign * change``, which is exact and so
equal to re-evaluating it.  The state is held as float64 (exact for counts below 2^52) and
written out as int64.

Total propensity: ``a`` is zero-padded to n_pad = 4 ceil(C / 4) positions and
``a0 = (P_0 + P_1) + (P_2 + P_3)`` with ``P_m = ((a_m + a_{m+4}) + a_{m+8}) + ...`` (four
independent running sums keep the dependency chain short).  It is recomputed from ALL
current propensities after every event, never updated incrementally, so it cannot drift: it
is 0 exactly when every channel is 0.  Only the channels in the dependency list of the fired
channel are re-evaluated, in the order of that list.

Search order: the n_pad positions are searched in a list ``order`` that starts sorted by
decreasing initial propensity (ties by position: a stable sort) and adapts: when the channel
at place k > 0 fires, it swaps places with place k - 1 (the sorting direct method of
McCollum et al. 2006), so frequent channels are found after one or two additions.  The order
carries over from settling to the window.  It changes which uniform maps to which channel,
not the law of the process.

Per event, in this order:

1. if ``a0 <= 0`` the state is absorbing: stop (the state holds to the end);
2. ``u1 = next_double``; ``t_new = t + (-log(1.0 - u1) / a0)``;
3. if ``t_new > end`` stop: the event does not happen and the state holds to the end
   (the draw is spent; the exponential law is memoryless, so discarding it is exact);
4. (window only) close every fine bin whose right edge is ``< t_new`` (the state at an edge
   is the state after all events at times ``<=`` the edge: right-continuous sampling);
5. ``u2 = next_double``; ``target = u2 * a0``; walking ``order``, the channel is the first
   whose running sum ``((a_order[0] + a_order[1]) + ...)`` is ``> target`` (the first four
   places are compared without branches, which gives the same place since the running sum
   never decreases); if rounding leaves none, the last place in ``order`` with ``a > 0``;
   then the swap above;
5a. (only with a modulation, and only when the selected channel is the modulated one r)
   ``u3 = next_double``; with the window time ``tw = t_new + t_shift`` (``t_shift = 0.0``
   in the window, ``-settle_s`` while settling) and ``arg = w * tw + phase`` (``w = (2.0 *
   pi) * frequency_Hz``): ``h = 1.0 + depth * sin(arg)`` (sine) or ``h = 1.0 + depth`` if
   ``sin(arg) >= 0.0`` else ``1.0 - depth`` (square); unless ``u3 * (1.0 + depth) < h``
   the candidate is rejected: ``t = t_new``, nothing else changes (no state change, no
   count, no flow; the swap of step 5 stays) and the loop goes on at step 1;
6. ``t = t_new``; apply the change (recording first counts the event in ``events_out`` and,
   with flow recording, adds ``flow_weight[p]`` to ``flows_out[j]`` of the current fine bin
   j, the one with ``e_j < t <= e_{j+1}`` (bin 0 also holds t = 0); then it integrates each
   changed species over the time since it was last integrated to: ``acc += x * dt``,
   ``acc2 += (x * x) * dt``);
7. update the slots of the changed species, then re-evaluate the dependent channels;
   recompute a0.

The settling phase runs on its own clock from 0 to ``settle_s`` with steps 1-3 and 5-7 and no
recording (a modulation sees it as window time ``t - settle_s``, from -settle_s to 0).  Then
``excess`` is added and (if it is not zero) every slot and propensity is re-evaluated; the
window starts at t = 0 with a fresh draw (exact by the Markov property).

Recording: fine bin j covers ``[e_j, e_{j+1}]`` with ``e_j = duration_s * (j / n_bins)``
(``n_bins = n_samples * oversample``; the quotient in floating point), so the sample times
``t_k = e_{k * oversample} = duration_s * (k / n_samples)`` coincide with edges exactly
(the quotient is correctly rounded, whatever the common factor).  Each species carries the
time it was last integrated to; an event integrates only the species it changes, and closing
a bin integrates every species to the edge, writes the bin average ``integral / (e_{j+1} -
e_j)``, adds the bin's integrals of x and x^2 to the window totals (so the totals are exact
integrals of the piecewise-constant path, summed bin by bin) and, at every
``oversample``-th edge, writes the sample.  Work per event is independent of the number of
species and bins; work per bin is O(species); an event that spans many bins closes them in
a row with the constant state.

Time-modulated channel (optional, off by default): one channel r has the propensity
``a_r(x) h(t)`` with ``0 <= h(t) <= 1 + depth``, ``depth`` in [0, 1]: sine ``h = 1 + depth
sin(2 pi f t + phase)`` or a 50 % square wave ``1 +/- depth`` (the sign of the same sine).
It is simulated exactly by thinning (Lewis & Shedler 1979): the tables carry the dominating
channel, coefficient ``k_r * (1.0 + depth)`` (one rounding, in :func:`simulate`), so a0 is
the total of the dominating process; a candidate of channel r at time t is accepted with
probability ``h(t) / (1 + depth)`` (step 5a).  A rejected candidate leaves the state alone,
and by the memoryless property the next candidate is drawn afresh from t.  Without a
modulation no extra draw is made and every trajectory is the one of the plain engine.

Layout for speed: every channel's changes, slot updates and dependents sit in one record of
fixed length (padded with no-op entries), so the inner loops have fixed trip counts and the
branch predictor is not misled by which channel fired; integer tables are uint64, which
spares numba's negative-index handling.  Two hand optimisations stay because the benchmark
shows they pay (best of 5 alternating runs on the benchmark network, thread CPU time): a
dependent channel and its three slots packed into one 64-bit word (unpacked into four words:
18-23 instead of 24-24.5 M events/s) and the branch-free comparison of the first four
places of the search (a plain loop: 22.8 instead of 24.8-25.0 M events/s).  The four running
sums of a0 are not an optimisation one may drop: they fix the order of the additions, and
so a0 and every draw after it.

References
----------
D. T. Gillespie, "A general method for numerically simulating the stochastic time evolution
of coupled chemical reactions", J. Comput. Phys. 22, 403 (1976) (the direct method).
D. Blackman and S. Vigna, "Scrambled linear pseudorandom number generators", ACM Trans.
Math. Softw. 47, 36 (2021) (xoshiro256++).
P. A. W. Lewis and G. S. Shedler, "Simulation of nonhomogeneous Poisson processes by
thinning", Naval Res. Logist. Q. 26, 403 (1979) (the thinning of step 5a).
J. M. McCollum, G. D. Peterson, C. D. Cox, M. L. Simpson and N. F. Samatova, "The sorting
direct method for stochastic simulation of biochemical systems with varying reaction
execution behavior", Comput. Biol. Chem. 30, 39 (2006).
"""

from __future__ import annotations

import math

import numpy as np

from ._jit import inline_step, jit, step
from .rng import u64_to_double, xoshiro_step
from .tables import (
    SINE,
    SQUARE,
    KernelOptions,
    KernelTables,
    Modulation,
    Outputs,
    TrajectoryResult,
    Work,
    allocate_outputs,
    allocate_work,
    build_tables,
    check_model,
    kernel_arrays,
    loop_tables,
    make_options,
    validate_inputs,
    validate_options,
)

__all__ = [
    "SINE",
    "SQUARE",
    "KernelOptions",
    "KernelTables",
    "Modulation",
    "Outputs",
    "TrajectoryResult",
    "Work",
    "allocate_outputs",
    "allocate_work",
    "build_tables",
    "check_model",
    "kernel_arrays",
    "make_options",
    "run",
    "simulate",
    "validate_inputs",
    "validate_options",
]

# Index arrays read inside the event loop are uint64 (with the typed constants below): numba
# then emits no negative-index wraparound code for them.  (Mixing uint64 with a plain int
# literal would silently promote to float64, hence the constants.)
_U0 = np.uint64(0)
_U1 = np.uint64(1)
_U2 = np.uint64(2)
_U3 = np.uint64(3)
_U4 = np.uint64(4)
_M16 = np.uint64(0xFFFF)
_S16 = np.uint64(16)
_S32 = np.uint64(32)
_S48 = np.uint64(48)
# The recording switch as non-literal booleans: literal True/False arguments would make numba
# compile the phase function twice (once per literal).
_NO = np.bool_(False)
_YES = np.bool_(True)


# ============================================================================ the steps
@inline_step
def _total(a, nq):
    """a0 = (P_0 + P_1) + (P_2 + P_3), P_m = ((a_m + a_{m+4}) + a_{m+8}) + ... over the
    ``4 nq`` positions (module notes: four running sums keep the dependency chain short)."""
    p0 = a[0]
    p1 = a[1]
    p2 = a[2]
    p3 = a[3]
    i = _U1
    while i < nq:
        b = _U4 * i
        p0 += a[b]
        p1 += a[b + _U1]
        p2 += a[b + _U2]
        p3 += a[b + _U3]
        i += _U1
    return (p0 + p1) + (p2 + p3)


@step
def _draw_channel(a, order, target):
    """Step 5: the channel at the first place of ``order`` whose running sum exceeds
    ``target`` (the rounding guard: else the last place with a > 0); it then swaps places
    with its predecessor (sorting direct method).  Returns the channel (uint64)."""
    n = np.uint64(order.shape[0])
    c0 = a[order[0]]
    c1 = c0 + a[order[1]]
    c2 = c1 + a[order[2]]
    c3 = c2 + a[order[3]]
    # the first four places without branches: the running sum never decreases
    k = ((np.uint64(c0 <= target) + np.uint64(c1 <= target))
         + (np.uint64(c2 <= target) + np.uint64(c3 <= target)))
    if k == _U4:
        cum = c3
        while k < n:
            cum += a[order[k]]
            if cum > target:
                break
            k += _U1
        if k == n:  # rounding guard: the last position with a > 0
            k = n - _U1
            while k > _U0 and a[order[k]] <= 0.0:
                k -= _U1
    p = order[k]
    km = k - np.uint64(k > _U0)
    order[k] = order[km]
    order[km] = p
    return p


@step
def _accept(opt, tw, u3):
    """Step 5a: whether a candidate of the modulated channel at window time ``tw`` [s] is
    kept, ``u3 * (1.0 + depth) < h(tw)`` (thinning, Lewis & Shedler 1979)."""
    sn = math.sin(opt.mod_w * tw + opt.mod_phase)
    if opt.mod_kind == SINE:
        h = 1.0 + opt.mod_depth * sn
    elif sn >= 0.0:
        h = 1.0 + opt.mod_depth
    else:
        h = 1.0 - opt.mod_depth
    return u3 * (1.0 + opt.mod_depth) < h


@step
def _apply_event(tb, p, st):
    """Step 6 while settling: add the change of channel p to the counts."""
    bi = p * tb.rec
    c = _U0
    while c < tb.n_cols:
        b = tb.itab[bi + c]
        st[b] = st[b] + tb.ftab[bi + c]
        c += _U1


@step
def _apply_recorded(tb, p, t, st):
    """Step 6 in the window: integrate each changed species up to t [s], then change it."""
    bi = p * tb.rec
    c = _U0
    while c < tb.n_cols:
        b = tb.itab[bi + c]
        xs = st[b]
        dt = t - st[b + _U1]
        st[b + _U2] += xs * dt
        st[b + _U3] += xs * xs * dt
        st[b + _U1] = t
        st[b] = xs + tb.ftab[bi + c]
        c += _U1


@step
def _update_propensities(tb, p, slot, a):
    """Step 7: update the slots of the species channel p changed, then re-evaluate its
    dependent channels ``(k * g0) * (g1 * g2)`` in the order of its list."""
    bi = p * tb.rec
    u = tb.n_cols
    off_dep = tb.n_cols + tb.n_upd
    while u < off_dep:
        b = tb.itab[bi + u]
        slot[b] = slot[b] + tb.ftab[bi + u]
        u += _U1
    e = off_dep + tb.n_dep
    while u < e:
        w = tb.itab[bi + u]
        a[w & _M16] = ((tb.ftab[bi + u] * slot[(w >> _S16) & _M16])
                       * (slot[(w >> _S32) & _M16] * slot[w >> _S48]))
        u += _U1


@step
def _begin_window(st, out):
    """Recording starts: sample 0, every species integrated from t = 0, totals zeroed."""
    for s in range(out.samples.shape[1]):
        out.samples[0, s] = np.int64(st[4 * s])
        st[4 * s + 1] = 0.0
        st[4 * s + 2] = 0.0
        st[4 * s + 3] = 0.0
        out.integ[s] = 0.0
        out.integ2[s] = 0.0
    for r in range(out.events.shape[0]):
        out.events[r] = 0


@jit
def _close_bins(t_limit, j, bin_start, st, duration_s, n_bins, oversample, out):
    """Step 4: close every fine bin whose right edge is < t_limit (all remaining for
    t_limit = inf); writes bin averages, window integrals and samples (module notes).

    Returns the new current bin index, its start and its right edge [s].
    """
    fb = np.float64(n_bins)
    edge = duration_s * (np.float64(j + 1) / fb)
    while j < n_bins and edge < t_limit:
        width = edge - bin_start
        for s in range(out.samples.shape[1]):
            b = 4 * s
            xs = st[b]
            dt = edge - st[b + 1]
            acc = st[b + 2] + xs * dt
            acc2 = st[b + 3] + xs * xs * dt
            out.bins[j, s] = acc / width
            out.integ[s] += acc
            out.integ2[s] += acc2
            st[b + 1] = edge
            st[b + 2] = 0.0
            st[b + 3] = 0.0
        j += 1
        if j < n_bins and j % oversample == 0:
            k = j // oversample
            for s in range(out.samples.shape[1]):
                out.samples[k, s] = np.int64(st[4 * s])
        bin_start = edge
        edge = duration_s * (np.float64(j + 1) / fb)
    return j, bin_start, edge


# ============================================================================ the loop
@jit
def _phase(record, t_end, t_shift, tb, opt, work, out, rng_state, n_samples, oversample):
    """The direct method from t = 0 to ``t_end`` [s]; records only when ``record`` is true.

    The steps of the module notes, in that order.  ``t_shift`` is the window time at this
    phase's t = 0 [s] (what a modulation sees).  Returns the number of accepted events.
    """
    st, slot, a, order = work
    n_bins = n_samples * oversample
    flow_on = record and opt.flow_weight.shape[0] > 0
    if record:
        _begin_window(st, out)
    j = np.int64(0)
    bin_start = 0.0
    next_edge = t_end * (1.0 / np.float64(n_bins))
    nq = np.uint64(order.shape[0]) // _U4
    a0 = _total(a, nq)
    s0, s1, s2, s3 = rng_state[0], rng_state[1], rng_state[2], rng_state[3]
    t = 0.0
    n_events = 0
    while a0 > 0.0:                                                     # step 1
        v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)                # step 2
        t_new = t + (-math.log(1.0 - u64_to_double(v)) / a0)
        if t_new > t_end:                                               # step 3
            break
        if record and next_edge < t_new:                                # step 4
            j, bin_start, next_edge = _close_bins(t_new, j, bin_start, st, t_end, n_bins,
                                                  oversample, out)
        v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)                # step 5
        p = _draw_channel(a, order, u64_to_double(v) * a0)
        if p == opt.mod_channel:                                        # step 5a
            v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)
            if not _accept(opt, t_new + t_shift, u64_to_double(v)):
                t = t_new  # thinning: the candidate is rejected, nothing changes
                continue
        t = t_new                                                       # step 6
        n_events += 1
        if record:
            out.events[p] += 1
            if flow_on:
                out.flows[j] += opt.flow_weight[p]
            _apply_recorded(tb, p, t, st)
        else:
            _apply_event(tb, p, st)
        _update_propensities(tb, p, slot, a)                            # step 7
        a0 = _total(a, nq)
    if record:
        _close_bins(np.inf, j, bin_start, st, t_end, n_bins, oversample, out)
    rng_state[0] = s0
    rng_state[1] = s1
    rng_state[2] = s2
    rng_state[3] = s3
    return n_events


@jit
def _evaluate_all(st, slot, a, tb):
    """Every slot ``sign * x + offset`` and every propensity ``(k * g0) * (g1 * g2)`` from
    the state; a is zero beyond the channels (padding and scratch entry)."""
    slot[0] = 1.0
    for k in range(1, tb.slot_st.shape[0]):
        slot[k] = tb.slot_go[2 * k] * st[tb.slot_st[k]] + tb.slot_go[2 * k + 1]
    for q in range(a.shape[0]):
        a[q] = 0.0
    for q in range(tb.coefficient.shape[0]):
        a[q] = ((tb.coefficient[q] * slot[tb.fslot[3 * q]])
                * (slot[tb.fslot[3 * q + 1]] * slot[tb.fslot[3 * q + 2]]))


@step
def _initial_order(a, order):
    """The search order: decreasing propensity, ties by position (stable insertion)."""
    for k in range(order.shape[0]):
        m = k
        while m > 0 and a[order[m - 1]] < a[k]:
            order[m] = order[m - 1]
            m -= 1
        order[m] = k


@jit
def run(tables, options, work, out, x0, excess, rng_state, settle_s, duration_s, n_samples,
        oversample):
    """Run one trajectory (the one compiled entry; :func:`simulate` validates and allocates).

    Parameters
    ----------
    tables : KernelTables  The model (:func:`~grmc.engine.tables.loop_tables`)
    options : KernelOptions  Modulation and flows (:func:`~grmc.engine.tables.make_options`)
    work : Work  Work arrays (:func:`~grmc.engine.tables.allocate_work`), overwritten
    out : Outputs  (out) What the trajectory records
        (:func:`~grmc.engine.tables.allocate_outputs`; ``flows`` of length n_samples *
        oversample when ``options`` has flow weights)
    x0 : int64[S]  State at t = -settle_s [count]
    excess : int64[S]  Added to the state at t = 0 [count]
    rng_state : uint64[4]  xoshiro256++ state, advanced in place
    settle_s : float64  Settling time, not recorded [s]
    duration_s : float64  Window length [s]
    n_samples, oversample : int64  Samples in the window; fine bins per sample interval

    Returns
    -------
    int  Events in the window [count]

    Notes
    -----
    No validation: the state must keep every propensity >= 0 (valid counts, traps within
    [0, T_k]).  Never allocates; releases the GIL.
    """
    st, slot, a, order = work
    n_species = x0.shape[0]
    for s in range(st.shape[0] // 4):
        st[4 * s] = np.float64(x0[s]) if s < n_species else 0.0
        st[4 * s + 1] = 0.0
        st[4 * s + 2] = 0.0
        st[4 * s + 3] = 0.0
    _evaluate_all(st, slot, a, tables)
    _initial_order(a, order)
    for i in range(out.flows.shape[0]):
        out.flows[i] = 0.0
    if settle_s > 0.0:
        _phase(_NO, settle_s, -settle_s, tables, options, work, out, rng_state, n_samples,
               oversample)
    changed = False
    for s in range(n_species):
        if excess[s] != 0:
            changed = True
            st[4 * s] = st[4 * s] + np.float64(excess[s])
    if changed:
        _evaluate_all(st, slot, a, tables)
    n_events = _phase(_YES, duration_s, 0.0, tables, options, work, out, rng_state,
                      n_samples, oversample)
    for s in range(n_species):
        out.final[s] = np.int64(st[4 * s])
    return n_events


def simulate(stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
             dep_indices, *, x0, rng_state: np.ndarray, settle_s: float = 0.0,
             excess=None, duration_s: float, n_samples: int, oversample: int = 1,
             modulation=None, flow_weight=None) -> TrajectoryResult:
    """Simulate one trajectory with the compiled engine.

    Parameters
    ----------
    stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr, dep_indices
        The model's plain arrays, as :func:`kernel_arrays` returns them.
    x0 : array_like of int, shape (S,)  State at t = -settle_s [count]
    rng_state : ndarray of uint64, shape (4,)
        xoshiro256++ state (:func:`grmc.engine.rng.stream_state`); ADVANCED IN PLACE, so
        consecutive calls continue the stream.
    settle_s : float  Simulated and discarded before t = 0 [s]
    excess : array_like of int, shape (S,), optional  Added to the state at t = 0 [count]
    duration_s : float  Window length [s]
    n_samples : int  Samples at t_k = duration_s * k / n_samples, k = 0..n_samples-1
    oversample : int  Fine bins per sample interval (>= 1)
    modulation : Modulation or 5-tuple, optional
        ``(channel, kind, frequency_Hz, depth, phase_rad)``: the channel's propensity is
        multiplied by h(t) (sine or square, see :class:`Modulation`), simulated exactly by
        thinning (module notes, step 5a).  None (default): no modulation, and the
        trajectory is exactly the one without this argument.
    flow_weight : array_like of int, shape (C,), optional
        Record ``flows``: each window event of channel r adds ``flow_weight[r]`` to its fine
        bin (e.g. +1 for a channel that delivers a carrier to a contact: the current is
        ``q * flows / bin width``).  None (default): ``flows`` is empty.

    Returns
    -------
    TrajectoryResult

    Raises
    ------
    ValueError, TypeError
        See :func:`validate_inputs` and :func:`validate_options`.

    Notes
    -----
    The first call in a process compiles the kernels (a few seconds) or loads them from
    numba's cache (see :mod:`grmc.engine._jit`).  The model arrays are checked and turned into
    :class:`KernelTables` once per distinct model (cached by content), so the cost per call
    beyond the simulation is a fraction of a millisecond.  The compiled part releases the
    GIL: threads may run trajectories side by side.  :func:`grmc.engine.oracle.simulate`
    takes the same arguments and returns the identical result, slowly.  To run many
    trajectories of one model without the checks, build the records once and call
    :func:`run` (as ``benchmarks/bench_engine.py`` does).

    Examples
    --------
    >>> import grmc
    >>> from grmc.engine import kernels, rng
    >>> model = grmc.build_model(grmc.load_scenario("scenarios/p_type_trap_box.toml"))
    >>> x0 = model.nearest_neutral_state([1.0, 1.0e5, 1.0])
    >>> res = kernels.simulate(*kernels.kernel_arrays(model), x0=x0,
    ...                        rng_state=rng.stream_state(7, 0), duration_s=1e-7,
    ...                        n_samples=64)                                # doctest: +SKIP
    >>> res.samples.shape                                                  # doctest: +SKIP
    (64, 3)
    """
    v = validate_inputs(stoich, coefficient, factor_species, factor_sign, factor_offset,
                        dep_indptr, dep_indices, x0=x0, rng_state=rng_state,
                        settle_s=settle_s, excess=excess, duration_s=duration_s,
                        n_samples=n_samples, oversample=oversample)
    mod, fw = validate_options(modulation, flow_weight, v["stoich"].shape[0])
    tables = loop_tables(v, mod)
    n_species, n_channels = v["x0"].shape[0], v["stoich"].shape[0]
    out = allocate_outputs(n_species, n_channels, v["n_samples"], v["oversample"],
                           flows=fw is not None)
    n_events = run(tables, make_options(mod, fw), allocate_work(tables, n_species), out,
                   v["x0"], v["excess"], rng_state, v["settle_s"], v["duration_s"],
                   np.int64(v["n_samples"]), np.int64(v["oversample"]))
    return TrajectoryResult(*out[:6], int(n_events), rng_state.copy(), out.flows)
