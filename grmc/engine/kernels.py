"""The compiled event engine: Gillespie's direct method with exact time-averaged recording.

One call of :func:`run_trajectory` simulates one trajectory of the model given as plain
arrays: it settles for ``settle_s`` without recording, adds ``excess`` to the state, and
records the window ``[0, duration_s]``: states at the sample times, exact time averages over
fine bins, exact integrals of x and x^2, event counts per channel and the final state.
:func:`simulate` is the public wrapper (validates, allocates, returns a
:class:`TrajectoryResult`); :func:`kernel_arrays` pulls the arrays out of a ``Model``.
The compiled, allocation-free kernel is :func:`run_prepared`: it reads the model as
:class:`KernelTables` (:func:`build_tables`, once per model) and works in arrays from
:func:`allocate_work`; it never allocates and releases the GIL.

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
spares numba's negative-index handling.

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
from typing import NamedTuple

import numpy as np

from ._jit import jit
from .rng import u64_to_double, xoshiro_step

__all__ = [
    "SINE",
    "SQUARE",
    "KernelTables",
    "Modulation",
    "TrajectoryResult",
    "allocate_outputs",
    "allocate_work",
    "build_tables",
    "check_model",
    "kernel_arrays",
    "run_prepared",
    "run_prepared_full",
    "run_trajectory",
    "simulate",
    "validate_inputs",
    "validate_options",
]


_NO_FLOWS = np.zeros(0, dtype=np.float64)
_NO_FLOWS.setflags(write=False)


class TrajectoryResult(NamedTuple):
    """What one trajectory records.

    Attributes
    ----------
    samples : ndarray of int64, shape (n_samples, species)
        State at t_k = duration_s * k / n_samples (right-continuous) [count]
    bins : ndarray of float64, shape (n_samples * oversample, species)
        Exact time average over each fine bin [count]
    integ : ndarray of float64, shape (species,)
        Integral of x over the window [count s]
    integ2 : ndarray of float64, shape (species,)
        Integral of x^2 over the window [count^2 s]
    events : ndarray of int64, shape (channels,)
        Events of each channel in the window [count]
    final : ndarray of int64, shape (species,)
        State at t = duration_s [count]
    n_events : int
        Events in the window [count]
    rng_state : ndarray of uint64, shape (4,)
        The stream's state after the run (a copy)
    flows : ndarray of float64, shape (n_samples * oversample,) or (0,)
        With ``flow_weight``: the sum of ``flow_weight[r]`` over the window's events of each
        fine bin (an event at t counts in the bin with e_j < t <= e_{j+1}); empty without
        [count]
    """

    samples: np.ndarray
    bins: np.ndarray
    integ: np.ndarray
    integ2: np.ndarray
    events: np.ndarray
    final: np.ndarray
    n_events: int
    rng_state: np.ndarray
    flows: np.ndarray = _NO_FLOWS


#: Kinds of :class:`Modulation`.
SINE = 1
SQUARE = 2


class Modulation(NamedTuple):
    """A time-modulated channel: its propensity is multiplied by h(t) (module notes).

    Attributes
    ----------
    channel : int  The channel index r
    kind : int  :data:`SINE` (1): h = 1 + depth sin(2 pi f t + phase); :data:`SQUARE` (2):
        h = 1 + depth where sin(2 pi f t + phase) >= 0, else 1 - depth (50 % duty)
    frequency_Hz : float  f (>= 0) [Hz]
    depth : float  In [0, 1]
    phase_rad : float  [rad]

    t is the window time (0 at the end of settling).
    """

    channel: int
    kind: int
    frequency_Hz: float
    depth: float
    phase_rad: float


# ============================================================================ compiled parts
# Index arrays read inside the event loop are uint64 (with the typed constants below): numba
# then emits no negative-index wraparound code for them.  (Mixing uint64 with a plain int
# literal would silently promote to float64, hence the constants.)  The event loop is written
# out in one function: numba compiles every jitted function separately and would not inline a
# call that passes this many arrays; fewer functions also keep the compile time down.
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
#: ``mod_ch`` of "no modulation": no channel has this index.
_NO_CHANNEL = np.uint64(2**64 - 1)


@jit
def _close_bins(t_limit, j, bin_start, st, n_species, duration_s, n_bins, oversample,
                samples_out, bins_out, integ_out, integ2_out):
    """Close every fine bin whose right edge is < t_limit (all remaining for t_limit = inf).

    Returns the new current bin index, its start and its right edge [s].
    """
    fb = np.float64(n_bins)
    edge = duration_s * (np.float64(j + 1) / fb)
    while j < n_bins and edge < t_limit:
        width = edge - bin_start
        for s in range(n_species):
            b = 4 * s
            xs = st[b]
            dt = edge - st[b + 1]
            acc = st[b + 2] + xs * dt
            acc2 = st[b + 3] + xs * xs * dt
            bins_out[j, s] = acc / width
            integ_out[s] += acc
            integ2_out[s] += acc2
            st[b + 1] = edge
            st[b + 2] = 0.0
            st[b + 3] = 0.0
        j += 1
        if j < n_bins and j % oversample == 0:
            k = j // oversample
            for s in range(n_species):
                samples_out[k, s] = np.int64(st[4 * s])
        bin_start = edge
        edge = duration_s * (np.float64(j + 1) / fb)
    return j, bin_start, edge


@jit
def _phase(record, t_end, st, slot, a, order, rng_state, itab, ftab, dims, n_samples,
           oversample, samples_out, bins_out, integ_out, integ2_out, events_out,
           mod_ch, mod_kind, mod_w, mod_depth, mod_phase, t_shift, flow_on, flow_w,
           flows_out):
    """The direct method from t = 0 to ``t_end``; records only when ``record`` is true.

    Returns the number of (accepted) events.  The steps are those of the module notes, in
    that order.  ``a`` holds n_pad propensities and one scratch entry; ``order`` the n_pad
    search positions.  ``mod_ch`` is the modulated channel (``_NO_CHANNEL``: none),
    ``mod_kind`` 1 (sine) or 2 (square), ``mod_w = 2 pi f``, ``t_shift`` the window time at
    this phase's t = 0; ``flow_w`` (float64[C]) and ``flows_out`` are touched only when
    ``record and flow_on``.
    """
    n_species = samples_out.shape[1]
    n_cols = dims[0]
    n_upd = dims[1]
    n_dep = dims[2]
    rec_i = dims[3]
    rec_f = dims[4]
    off_dep = n_cols + n_upd
    n_bins = n_samples * oversample
    if record:
        for s in range(n_species):
            samples_out[0, s] = np.int64(st[4 * s])
            st[4 * s + 1] = 0.0
            st[4 * s + 2] = 0.0
            st[4 * s + 3] = 0.0
            integ_out[s] = 0.0
            integ2_out[s] = 0.0
        for r in range(events_out.shape[0]):
            events_out[r] = 0
    j = np.int64(0)
    bin_start = 0.0
    next_edge = t_end * (1.0 / np.float64(n_bins))
    n = np.uint64(order.shape[0])
    nq = n // _U4
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
    a0 = (p0 + p1) + (p2 + p3)
    s0 = rng_state[0]
    s1 = rng_state[1]
    s2 = rng_state[2]
    s3 = rng_state[3]
    t = 0.0
    n_events = 0
    while a0 > 0.0:                                                     # step 1
        v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)                # step 2
        t_new = t + (-math.log(1.0 - u64_to_double(v)) / a0)
        if t_new > t_end:                                               # step 3
            break
        if record and next_edge < t_new:                                # step 4
            j, bin_start, next_edge = _close_bins(
                t_new, j, bin_start, st, n_species, t_end, n_bins, oversample,
                samples_out, bins_out, integ_out, integ2_out)
        v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)                # step 5
        target = u64_to_double(v) * a0
        # first position whose running sum exceeds target: the first four without branches
        c0 = a[order[0]]
        c1 = c0 + a[order[1]]
        c2 = c1 + a[order[2]]
        c3 = c2 + a[order[3]]
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
        km = k - np.uint64(k > _U0)  # sorting direct method: swap with the predecessor
        order[k] = order[km]
        order[km] = p
        if p == mod_ch:                                                 # step 5a
            v, s0, s1, s2, s3 = xoshiro_step(s0, s1, s2, s3)
            sn = math.sin(mod_w * (t_new + t_shift) + mod_phase)
            if mod_kind == 1:
                h = 1.0 + mod_depth * sn
            elif sn >= 0.0:
                h = 1.0 + mod_depth
            else:
                h = 1.0 - mod_depth
            if not (u64_to_double(v) * (1.0 + mod_depth) < h):
                t = t_new  # thinning: the candidate is rejected, nothing changes
                continue
        t = t_new                                                       # step 6
        n_events += 1
        bi = p * rec_i
        bf = p * rec_f
        if record:
            events_out[p] += 1
            if flow_on:
                flows_out[j] += flow_w[p]
            c = _U0
            while c < n_cols:
                b = itab[bi + c]
                xs = st[b]
                dt = t - st[b + _U1]
                st[b + _U2] += xs * dt
                st[b + _U3] += xs * xs * dt
                st[b + _U1] = t
                st[b] = xs + ftab[bf + c]
                c += _U1
        else:
            c = _U0
            while c < n_cols:
                b = itab[bi + c]
                st[b] = st[b] + ftab[bf + c]
                c += _U1
        u = n_cols                                                      # step 7
        while u < off_dep:
            b = itab[bi + u]
            slot[b] = slot[b] + ftab[bf + u]
            u += _U1
        u = off_dep
        e = off_dep + n_dep
        while u < e:
            w = itab[bi + u]
            a[w & _M16] = ((ftab[bf + u] * slot[(w >> _S16) & _M16])
                           * (slot[(w >> _S32) & _M16] * slot[w >> _S48]))
            u += _U1
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
        a0 = (p0 + p1) + (p2 + p3)
    if record:
        _close_bins(np.inf, j, bin_start, st, n_species, t_end, n_bins, oversample,
                    samples_out, bins_out, integ_out, integ2_out)
    rng_state[0] = s0
    rng_state[1] = s1
    rng_state[2] = s2
    rng_state[3] = s3
    return n_events


@jit
def _evaluate_all(st, slot, a, coefficient, slot_st, slot_go, fslot):
    """Every slot ``sign * x + offset`` and every propensity ``(k * g0) * (g1 * g2)`` from
    the state; a is zero beyond the channels (padding and scratch entry)."""
    slot[0] = 1.0
    for k in range(1, slot_st.shape[0]):
        slot[k] = slot_go[2 * k] * st[slot_st[k]] + slot_go[2 * k + 1]
    for q in range(a.shape[0]):
        a[q] = 0.0
    for q in range(coefficient.shape[0]):
        a[q] = ((coefficient[q] * slot[fslot[3 * q]])
                * (slot[fslot[3 * q + 1]] * slot[fslot[3 * q + 2]]))


@jit
def run_prepared(x0, coefficient, slot_st, slot_go, fslot, itab, ftab, dims, st, slot, a,
                 order, rng_state, settle_s, excess, duration_s, n_samples, oversample,
                 samples_out, bins_out, integ_out, integ2_out, events_out, final_out):
    """The allocation-free kernel behind :func:`run_trajectory`.

    Arguments: ``x0``; the fields of :class:`KernelTables` in order, without ``n_pad``; the
    work arrays of :func:`allocate_work` (st, slot, a, order: contents overwritten); then
    the arguments of :func:`run_trajectory` from ``rng_state`` on.  Returns the number of
    events in the window.  Releases the GIL.  No modulation, no flow recording: this is
    :func:`run_prepared_full` with both off.
    """
    # integ_out stands in for the flow arrays, which are never touched with flow_on false
    # (same argument types: both entry points share one compiled _phase)
    return run_prepared_full(x0, coefficient, slot_st, slot_go, fslot, itab, ftab, dims, st,
                             slot, a, order, rng_state, settle_s, excess, duration_s,
                             n_samples, oversample, samples_out, bins_out, integ_out,
                             integ2_out, events_out, final_out, _NO_CHANNEL, np.int64(0), 0.0,
                             0.0, 0.0, _NO, integ_out, integ_out)


@jit
def run_prepared_full(x0, coefficient, slot_st, slot_go, fslot, itab, ftab, dims, st, slot,
                      a, order, rng_state, settle_s, excess, duration_s, n_samples,
                      oversample, samples_out, bins_out, integ_out, integ2_out, events_out,
                      final_out, mod_ch, mod_kind, mod_w, mod_depth, mod_phase, flow_on,
                      flow_w, flows_out):
    """:func:`run_prepared` with the optional modulation and flow recording.

    Extra arguments: ``mod_ch`` (uint64, the modulated channel; 2^64 - 1 for none; the
    tables must carry its coefficient times ``1.0 + mod_depth``), ``mod_kind`` (int64, 1 sine,
    2 square), ``mod_w`` (``(2.0 * pi) * frequency_Hz``), ``mod_depth``, ``mod_phase``
    (float64); ``flow_on`` (bool), ``flow_w`` (float64[C], the flow weights), ``flows_out``
    (float64[n_samples * oversample], zeroed here when ``flow_on``).
    """
    n_species = x0.shape[0]
    for s in range(st.shape[0] // 4):
        st[4 * s] = np.float64(x0[s]) if s < n_species else 0.0
        st[4 * s + 1] = 0.0
        st[4 * s + 2] = 0.0
        st[4 * s + 3] = 0.0
    _evaluate_all(st, slot, a, coefficient, slot_st, slot_go, fslot)
    # initial search order: decreasing propensity, ties by position (stable insertion)
    for k in range(order.shape[0]):
        m = k
        while m > 0 and a[order[m - 1]] < a[k]:
            order[m] = order[m - 1]
            m -= 1
        order[m] = k
    if flow_on:
        for i in range(flows_out.shape[0]):
            flows_out[i] = 0.0
    if settle_s > 0.0:
        _phase(_NO, settle_s, st, slot, a, order, rng_state, itab, ftab, dims, n_samples,
               oversample, samples_out, bins_out, integ_out, integ2_out, events_out,
               mod_ch, mod_kind, mod_w, mod_depth, mod_phase, -settle_s, flow_on, flow_w,
               flows_out)
    changed = False
    for s in range(n_species):
        if excess[s] != 0:
            changed = True
            st[4 * s] = st[4 * s] + np.float64(excess[s])
    if changed:
        _evaluate_all(st, slot, a, coefficient, slot_st, slot_go, fslot)
    n_events = _phase(_YES, duration_s, st, slot, a, order, rng_state, itab, ftab, dims,
                      n_samples, oversample, samples_out, bins_out, integ_out, integ2_out,
                      events_out, mod_ch, mod_kind, mod_w, mod_depth, mod_phase, 0.0, flow_on,
                      flow_w, flows_out)
    for s in range(n_species):
        final_out[s] = np.int64(st[4 * s])
    return n_events


# ============================================================================ Python side
class KernelTables(NamedTuple):
    """The model in the form the event loop reads (built once per model by
    :func:`build_tables`; it depends on the model only, not on the state).

    ``4 s`` is the index of species s in the kernel's state array ``st`` (count, time
    integrated to, integral of x and of x^2 over the current bin: ``st[4 s + 0..3]``); one
    scratch species block follows the S real ones.  A "slot" is one distinct factor
    ``sign * x + offset`` (slot 0 is the constant 1.0 of an unused factor; one scratch slot
    follows the real ones).  Every channel has a record of the same length (padded with
    no-op entries aimed at the scratch species, slot and propensity), so the loops of the
    event loop have fixed trip counts.

    Attributes
    ----------
    coefficient : float64[C]  k_r
    slot_st : uint64[n_slot]  State index 4 s of each slot's species
    slot_go : float64[2 n_slot]  Sign and offset of each slot
    fslot : uint64[3 C]  Slot of each factor of each channel (0 where unused)
    itab : uint64[C * rec_i]  Per channel: n_cols state indices 4 s of its changes; n_upd
        slots to update; n_dep dependents packed as ``q | i0 << 16 | i1 << 32 | i2 << 48``
        (the channel and its three slots)
    ftab : float64[C * rec_f]  Per channel: the n_cols changes; the n_upd slot increments
        ``sign * change``; the n_dep coefficients of the dependents
    dims : uint64[5]  n_cols, n_upd, n_dep, rec_i, rec_f
    n_pad : int  Propensity positions: C rounded up to a multiple of 4 (at least 4)
    """

    coefficient: np.ndarray
    slot_st: np.ndarray
    slot_go: np.ndarray
    fslot: np.ndarray
    itab: np.ndarray
    ftab: np.ndarray
    dims: np.ndarray
    n_pad: int


def build_tables(stoich, coefficient, factor_species, factor_sign, factor_offset,
                 dep_indptr, dep_indices) -> KernelTables:
    """The event loop's tables of a model given as plain arrays (no validation).

    Equal factors (same species, sign and offset) of different channels share one slot,
    evaluated once per event.  A slot is updated by adding ``sign * change``, which equals
    re-evaluating ``sign * x + offset`` exactly while signs, offsets and counts are integers
    (:func:`validate_inputs` checks that), so the propensities are bit for bit those of
    ``(k * g0) * (g1 * g2)`` with ``g = sign * x + offset``.

    Parameters
    ----------
    stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr, dep_indices
        As :func:`kernel_arrays` returns them.

    Returns
    -------
    KernelTables
    """
    stoich = np.asarray(stoich, dtype=np.int64)
    fs = np.asarray(factor_species, dtype=np.int64)
    fg = np.asarray(factor_sign, dtype=np.float64)
    fo = np.asarray(factor_offset, dtype=np.float64)
    dep_indptr = np.asarray(dep_indptr, dtype=np.int64)
    dep_indices = np.asarray(dep_indices, dtype=np.int64)
    coefficient = np.array(coefficient, dtype=np.float64)
    n_channels, n_species = stoich.shape
    n_pad = 4 * max(1, (n_channels + 3) // 4)
    keys: dict[tuple[int, float, float], int] = {}
    slot_st, slot_go = [4 * n_species], [0.0, 1.0]
    fslot = np.zeros(3 * n_channels, dtype=np.uint64)
    for r in range(n_channels):
        for f in range(3):
            s = int(fs[r, f])
            if s < 0:
                continue
            key = (s, float(fg[r, f]), float(fo[r, f]))
            if key not in keys:
                keys[key] = len(slot_st)
                slot_st.append(4 * s)
                slot_go.extend(key[1:])
            fslot[3 * r + f] = keys[key]
    scratch_slot = len(slot_st)
    if max(n_pad, scratch_slot) >= 2**16:
        raise ValueError("too many channels or factors for the packed tables (2^16)")
    changes, updates = [], []
    for r in range(n_channels):
        ch = [(s, float(stoich[r, s])) for s in np.flatnonzero(stoich[r]).tolist()]
        changes.append(ch)
        updates.append([(k, g * d) for s, d in ch for (ks, g, _), k in keys.items() if ks == s])
    deps = [dep_indices[dep_indptr[r]:dep_indptr[r + 1]].tolist() for r in range(n_channels)]
    n_cols = max(1, max(len(c) for c in changes))
    n_upd = max(1, max(len(u) for u in updates))
    n_dep = max(1, max(len(d) for d in deps))
    rec = n_cols + n_upd + n_dep
    itab = np.zeros((n_channels, rec), dtype=np.uint64)
    ftab = np.zeros((n_channels, rec), dtype=np.float64)
    for r in range(n_channels):
        for c in range(n_cols):
            itab[r, c], ftab[r, c] = changes[r][c] if c < len(changes[r]) else (n_species, 0.0)
            itab[r, c] *= 4
        for u in range(n_upd):
            itab[r, n_cols + u], ftab[r, n_cols + u] = (updates[r][u] if u < len(updates[r])
                                                         else (scratch_slot, 0.0))
        for i in range(n_dep):
            if i < len(deps[r]):
                q = deps[r][i]
                word = q | (int(fslot[3 * q]) << 16) | (int(fslot[3 * q + 1]) << 32) | (
                    int(fslot[3 * q + 2]) << 48)
                itab[r, n_cols + n_upd + i], ftab[r, n_cols + n_upd + i] = word, coefficient[q]
            else:  # the scratch propensity, written with 0 * 1 * 1 * 1
                itab[r, n_cols + n_upd + i], ftab[r, n_cols + n_upd + i] = n_pad, 0.0
    return KernelTables(
        coefficient=coefficient, slot_st=np.array(slot_st, dtype=np.uint64),
        slot_go=np.array(slot_go, dtype=np.float64), fslot=fslot, itab=itab.ravel(),
        ftab=ftab.ravel(), dims=np.array([n_cols, n_upd, n_dep, rec, rec], dtype=np.uint64),
        n_pad=n_pad)


def allocate_work(tables: KernelTables, n_species: int) -> tuple[np.ndarray, ...]:
    """Work arrays of the event loop: st, slot, a, order (contents set by the kernel)."""
    return (np.zeros(4 * (n_species + 1), dtype=np.float64),
            np.ones(tables.slot_st.shape[0] + 1, dtype=np.float64),
            np.zeros(tables.n_pad + 1, dtype=np.float64),
            np.zeros(tables.n_pad, dtype=np.uint64))


def run_trajectory(x0, stoich, coefficient, factor_species, factor_sign, factor_offset,
                   dep_indptr, dep_indices, rng_state, settle_s, excess, duration_s,
                   n_samples, oversample, samples_out, bins_out, integ_out, integ2_out,
                   events_out, final_out) -> int:
    """One trajectory: settle, add the excess, record the window (see the module notes).

    The kernel contract in plain arrays; builds the tables and work arrays (small, once per
    call) and runs the compiled :func:`run_prepared`.  No validation (:func:`simulate`
    validates); to run many trajectories of one model, build the tables once and call
    :func:`run_prepared`.

    Parameters
    ----------
    x0 : int64[S]  State at t = -settle_s [count]
    stoich : int64[C, S]  Change of each species per event [count]
    coefficient : float64[C]  k_r [s^-1 per product of counts]
    factor_species : int64[C, 3]  Species of each factor, -1 where unused
    factor_sign, factor_offset : float64[C, 3]  Factor ``sign * x + offset`` (exact law)
    dep_indptr : int64[C + 1], dep_indices : int64[:]  Channels to re-evaluate after each
        channel fires (CSR)
    rng_state : uint64[4]  xoshiro256++ state, advanced in place
    settle_s : float64  Settling time, not recorded [s]
    excess : int64[S]  Added to the state at t = 0 [count]
    duration_s : float64  Window length [s]
    n_samples, oversample : int64  Samples in the window; fine bins per sample interval
    samples_out : int64[n_samples, S]  (out) State at t_k [count]
    bins_out : float64[n_samples * oversample, S]  (out) Bin averages [count]
    integ_out, integ2_out : float64[S]  (out) Integrals of x and x^2 [count s], [count^2 s]
    events_out : int64[C]  (out) Events per channel in the window [count]
    final_out : int64[S]  (out) State at duration_s [count]

    Returns
    -------
    int  Events in the window [count]

    Notes
    -----
    The state must keep every propensity >= 0 (valid counts, traps within [0, T_k]).
    """
    raw = (stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
           dep_indices)
    key = ("tables",) + _model_key(raw)
    tables = _model_cache.get(key)
    if tables is None:
        tables = build_tables(*raw)
        _remember(key, tables)
    work = allocate_work(tables, np.asarray(x0).shape[0])
    return int(run_prepared(np.asarray(x0, dtype=np.int64), *tables[:-1], *work, rng_state,
                            float(settle_s), np.asarray(excess, dtype=np.int64),
                            float(duration_s), np.int64(n_samples), np.int64(oversample),
                            samples_out, bins_out, integ_out, integ2_out, events_out,
                            final_out))


def kernel_arrays(model) -> tuple[np.ndarray, ...]:
    """The plain arrays of a model in the kernels' argument order.

    Parameters
    ----------
    model : grmc.model.Model

    Returns
    -------
    tuple
        ``(stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
        dep_indices)``: C-contiguous, writable copies with the kernels' dtypes (int64,
        float64, int64, float64, float64, int64, int64); ``factor_offset`` is the EXACT
        law's offset.
    """
    indptr, indices = model.dependency
    return (
        np.array(model.stoich, dtype=np.int64, order="C", copy=True),
        np.array(model.coefficient, dtype=np.float64, order="C", copy=True),
        np.array(model.factor_species, dtype=np.int64, order="C", copy=True),
        np.array(model.factor_sign, dtype=np.float64, order="C", copy=True),
        np.array(model.factor_offset_exact, dtype=np.float64, order="C", copy=True),
        np.array(indptr, dtype=np.int64, order="C", copy=True),
        np.array(indices, dtype=np.int64, order="C", copy=True),
    )


def _as(a, dtype, ndim, name):
    arr = np.asarray(a)
    if arr.ndim != ndim:
        raise ValueError(f"{name} must have {ndim} dimension(s), has shape {arr.shape}")
    if dtype is np.int64 and arr.dtype.kind not in "iu" and (
            not np.all(np.isfinite(arr)) or not np.array_equal(arr, np.round(arr))):
        raise ValueError(f"{name} must hold integers")
    return np.array(arr, dtype=dtype, order="C", copy=True)


class _CheckedModel(NamedTuple):
    arrays: tuple[np.ndarray, ...]  # converted, in kernel_arrays order
    tables: KernelTables
    used: np.ndarray                # factor_species >= 0


#: Checked models and tables by the content of their arrays (a population run has a few
#: distinct models, each used by many trajectories).  Plain dict operations: thread safe
#: under the GIL; a race only builds the same entry twice.
_model_cache: dict[tuple, object] = {}
_MODEL_CACHE_SIZE = 64


def _model_key(arrays) -> tuple:
    out = []
    for a in arrays:
        a = np.asarray(a)
        out.append((a.dtype.str, a.shape, a.tobytes()))
    return tuple(out)


def _remember(key: tuple, value: object) -> None:
    if len(_model_cache) >= _MODEL_CACHE_SIZE:
        try:
            _model_cache.pop(next(iter(_model_cache)), None)
        except (StopIteration, RuntimeError):  # emptied or resized by another thread
            pass
    _model_cache[key] = value


def check_model(stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
                dep_indices) -> _CheckedModel:
    """Validate and convert a model's plain arrays and build its tables (cached by content).

    Raises
    ------
    ValueError
        On wrong shapes, negative or non-finite coefficients, non-integer factor signs or
        offsets, or a dependency list that misses a channel whose propensity an event
        changes (the result would silently be wrong).
    """
    raw = (stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
           dep_indices)
    key = _model_key(raw)
    hit = _model_cache.get(key)
    if hit is not None:
        return hit
    stoich = _as(stoich, np.int64, 2, "stoich")
    coefficient = _as(coefficient, np.float64, 1, "coefficient")
    factor_species = _as(factor_species, np.int64, 2, "factor_species")
    factor_sign = _as(factor_sign, np.float64, 2, "factor_sign")
    factor_offset = _as(factor_offset, np.float64, 2, "factor_offset")
    dep_indptr = _as(dep_indptr, np.int64, 1, "dep_indptr")
    dep_indices = _as(dep_indices, np.int64, 1, "dep_indices")
    n_channels, n_species = stoich.shape
    if n_species < 1 or n_channels < 1:
        raise ValueError("the model needs at least one species and one channel")
    if n_channels >= 2**16 - 4:
        raise ValueError("too many channels (at most 65531)")
    for name, arr in (("factor_species", factor_species), ("factor_sign", factor_sign),
                      ("factor_offset", factor_offset)):
        if arr.shape != (n_channels, 3):
            raise ValueError(f"{name} has shape {arr.shape}, expected ({n_channels}, 3)")
    if coefficient.shape != (n_channels,):
        raise ValueError(f"coefficient has shape {coefficient.shape}, expected ({n_channels},)")
    if not (np.all(np.isfinite(coefficient)) and np.all(coefficient >= 0.0)):
        raise ValueError("coefficients must be finite and >= 0")
    if np.any(factor_species >= n_species) or np.any(factor_species < -1):
        raise ValueError("factor_species must be -1 or a species index")
    used = factor_species >= 0
    for name, arr in (("factor_sign", factor_sign), ("factor_offset", factor_offset)):
        vals = arr[used]
        if not (np.all(np.isfinite(vals)) and np.all(vals == np.round(vals))
                and np.all(np.abs(vals) < 2**40)):
            raise ValueError(f"{name} must hold integers (the kernel's factor arithmetic is "
                             "exact only for integer-valued factors)")
    if dep_indptr.shape != (n_channels + 1,) or dep_indptr[0] != 0 or np.any(
            np.diff(dep_indptr) < 0) or dep_indptr[-1] != dep_indices.shape[0]:
        raise ValueError("dep_indptr is not a CSR index pointer over dep_indices")
    if np.any(dep_indices < 0) or np.any(dep_indices >= n_channels):
        raise ValueError("dep_indices must be channel indices")
    reads = np.zeros((n_channels, n_species), dtype=bool)  # channel q reads species s
    rows = np.repeat(np.arange(n_channels), 3)[used.ravel()]
    reads[rows, factor_species.ravel()[used.ravel()]] = True
    need = ((stoich != 0).astype(np.int64) @ reads.T.astype(np.int64)) > 0  # [r, q]
    have = np.zeros((n_channels, n_channels), dtype=bool)
    have[np.repeat(np.arange(n_channels), np.diff(dep_indptr)), dep_indices] = True
    missing = need & ~have
    if missing.any():
        r = int(np.flatnonzero(missing.any(axis=1))[0])
        raise ValueError(f"dependency list of channel {r} misses channels "
                         f"{np.flatnonzero(missing[r]).tolist()}")
    arrays = (stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr,
              dep_indices)
    for arr in arrays:
        arr.setflags(write=False)
    checked = _CheckedModel(arrays, build_tables(*arrays), used)
    _remember(key, checked)
    return checked


def validate_inputs(stoich, coefficient, factor_species, factor_sign, factor_offset,
                    dep_indptr, dep_indices, *, x0, rng_state, settle_s, excess, duration_s,
                    n_samples, oversample) -> dict:
    """Check and convert the inputs of :func:`simulate` (shared with the oracle).

    Returns
    -------
    dict
        The converted arrays (read-only) and scalars under the argument names, plus
        ``tables`` (:class:`KernelTables`).  ``rng_state`` is the caller's own array, which
        the run advances in place.

    Raises
    ------
    ValueError
        See :func:`check_model`; also on a negative start state or one with a negative
        propensity (e.g. more occupied traps than traps), counts beyond 2^52, an all-zero
        generator state, or bad times and sample counts.
    TypeError
        When ``rng_state`` is not a uint64 array of shape (4,).
    """
    checked = check_model(stoich, coefficient, factor_species, factor_sign, factor_offset,
                          dep_indptr, dep_indices)
    stoich, coefficient, factor_species, factor_sign, factor_offset, dep_indptr, dep_indices = (
        checked.arrays)
    used = checked.used
    n_species = stoich.shape[1]
    x0 = _as(x0, np.int64, 1, "x0")
    excess = (np.zeros_like(x0) if excess is None else _as(excess, np.int64, 1, "excess"))
    if x0.shape != (n_species,):
        raise ValueError(f"x0 has shape {x0.shape}, expected ({n_species},)")
    if excess.shape != (n_species,):
        raise ValueError(f"excess has shape {excess.shape}, expected ({n_species},)")
    if np.any(x0 < 0):
        raise ValueError("x0 must be >= 0")
    if np.any(x0 + excess < 0):
        raise ValueError("x0 + excess must be >= 0")
    if np.any(x0 + excess >= 2**52) or np.any(x0 >= 2**52):
        raise ValueError("counts must stay below 2^52 (the kernel holds them as float64)")
    for name, x in (("x0", x0), ("x0 + excess", x0 + excess)):
        g = np.where(used, factor_sign * x[np.maximum(factor_species, 0)] + factor_offset, 1.0)
        a = coefficient * np.prod(g, axis=1)
        if not np.all(np.isfinite(a)):
            raise ValueError(f"a propensity is not finite at {name}")
        if np.any(a < 0.0):
            raise ValueError(f"a propensity is negative at {name} (state out of range, e.g. "
                             "more occupied traps than traps)")
    if not (isinstance(rng_state, np.ndarray) and rng_state.dtype == np.uint64
            and rng_state.shape == (4,)):
        raise TypeError("rng_state must be a numpy uint64 array of shape (4,) "
                        "(see grmc.engine.rng.stream_state)")
    if not rng_state.flags.c_contiguous or not rng_state.flags.writeable:
        raise ValueError("rng_state must be C-contiguous and writable (it is advanced in place)")
    if not rng_state.any():
        raise ValueError("rng_state must not be all zero")
    settle_s = float(settle_s)
    duration_s = float(duration_s)
    if not (math.isfinite(settle_s) and settle_s >= 0.0):
        raise ValueError("settle_s must be finite and >= 0")
    if not (math.isfinite(duration_s) and duration_s > 0.0):
        raise ValueError("duration_s must be finite and > 0")
    if int(n_samples) != n_samples or n_samples < 1:
        raise ValueError("n_samples must be an integer >= 1")
    if int(oversample) != oversample or oversample < 1:
        raise ValueError("oversample must be an integer >= 1")
    n_samples, oversample = int(n_samples), int(oversample)
    if n_samples * oversample > 2**40:
        raise ValueError("n_samples * oversample is too large")
    return {"x0": x0, "stoich": stoich, "coefficient": coefficient,
            "factor_species": factor_species, "factor_sign": factor_sign,
            "factor_offset": factor_offset, "dep_indptr": dep_indptr, "dep_indices": dep_indices,
            "rng_state": rng_state, "settle_s": settle_s, "excess": excess,
            "duration_s": duration_s, "n_samples": n_samples, "oversample": oversample,
            "tables": checked.tables}


def validate_options(modulation, flow_weight, n_channels: int):
    """Check and convert the optional ``modulation`` and ``flow_weight`` of :func:`simulate`
    (shared with the oracle).

    Returns
    -------
    (Modulation or None, ndarray of float64 shape (C,) or None)
        The modulation with plain Python int and float fields; the flow weights as float64
        (exact: they are integers below 2^53 in magnitude).

    Raises
    ------
    ValueError
        On a channel out of range, a kind other than 1 (sine) or 2 (square), a negative or
        non-finite frequency, a depth outside [0, 1], a non-finite phase, or flow weights
        that are not C integers below 2^52 in magnitude.
    """
    mod = None
    if modulation is not None:
        if len(modulation) != 5:
            raise ValueError("modulation must be (channel, kind, frequency_Hz, depth, "
                             "phase_rad)")
        channel, kind, freq, depth, phase = modulation
        if int(channel) != channel or not 0 <= int(channel) < n_channels:
            raise ValueError(f"modulation channel must be an index in [0, {n_channels})")
        if kind not in (SINE, SQUARE):
            raise ValueError("modulation kind must be 1 (sine) or 2 (square)")
        freq, depth, phase = float(freq), float(depth), float(phase)
        if not (math.isfinite(freq) and freq >= 0.0):
            raise ValueError("modulation frequency_Hz must be finite and >= 0")
        if not (0.0 <= depth <= 1.0):
            raise ValueError("modulation depth must be in [0, 1]")
        if not math.isfinite(phase):
            raise ValueError("modulation phase_rad must be finite")
        mod = Modulation(int(channel), int(kind), freq, depth, phase)
    fw = None
    if flow_weight is not None:
        w = _as(flow_weight, np.int64, 1, "flow_weight")
        if w.shape != (n_channels,):
            raise ValueError(f"flow_weight has shape {w.shape}, expected ({n_channels},)")
        if np.any(np.abs(w) >= 2**52):
            raise ValueError("flow weights must be below 2^52 in magnitude")
        fw = w.astype(np.float64)
    return mod, fw


def allocate_outputs(n_species: int, n_channels: int, n_samples: int,
                     oversample: int) -> tuple[np.ndarray, ...]:
    """Zeroed output arrays of one trajectory: samples, bins, integ, integ2, events, final."""
    return (np.zeros((n_samples, n_species), dtype=np.int64),
            np.zeros((n_samples * oversample, n_species), dtype=np.float64),
            np.zeros(n_species, dtype=np.float64),
            np.zeros(n_species, dtype=np.float64),
            np.zeros(n_channels, dtype=np.int64),
            np.zeros(n_species, dtype=np.int64))


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
    takes the same arguments and returns the identical result, slowly.

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
    tables = v["tables"]
    out = allocate_outputs(v["x0"].shape[0], v["stoich"].shape[0], v["n_samples"],
                           v["oversample"])
    if mod is None and fw is None:
        work = allocate_work(tables, v["x0"].shape[0])
        n_events = run_prepared(v["x0"], *tables[:-1], *work, rng_state, v["settle_s"],
                                v["excess"], v["duration_s"], np.int64(v["n_samples"]),
                                np.int64(v["oversample"]), *out)
        return TrajectoryResult(*out, int(n_events), rng_state.copy())
    mod_args = (_NO_CHANNEL, np.int64(0), 0.0, 0.0, 0.0)
    if mod is not None:
        # the dominating process: the modulated channel at its bound (module notes)
        coefficient = v["coefficient"].copy()
        coefficient[mod.channel] = coefficient[mod.channel] * (1.0 + mod.depth)
        tables = check_model(v["stoich"], coefficient, v["factor_species"], v["factor_sign"],
                             v["factor_offset"], v["dep_indptr"], v["dep_indices"]).tables
        mod_args = (np.uint64(mod.channel), np.int64(mod.kind),
                    (2.0 * math.pi) * mod.frequency_Hz, mod.depth, mod.phase_rad)
    flows = np.zeros(v["n_samples"] * v["oversample"] if fw is not None else 0)
    work = allocate_work(tables, v["x0"].shape[0])
    n_events = run_prepared_full(
        v["x0"], *tables[:-1], *work, rng_state, v["settle_s"], v["excess"], v["duration_s"],
        np.int64(v["n_samples"]), np.int64(v["oversample"]), *out, *mod_args,
        np.bool_(fw is not None), fw if fw is not None else flows, flows)
    return TrajectoryResult(*out, int(n_events), rng_state.copy(), flows)
