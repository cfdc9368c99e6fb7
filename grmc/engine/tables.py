"""The model as the event loop reads it: validated plain arrays, tables and option records.

The Python side of the engine (no numba here): :func:`check_model` and
:func:`validate_inputs` check and convert the plain arrays of a model and a run,
:func:`build_tables` turns the model into :class:`KernelTables` (one record, built once per
model and cached by content), :func:`validate_options` and :func:`make_options` turn the
optional modulation and flow recording into :class:`KernelOptions` (one record whose "none"
values switch both off), and :func:`allocate_outputs` / :func:`allocate_work` give the arrays
the compiled loop writes into.  :class:`TrajectoryResult` is what one trajectory returns.
The compiled loop itself is in :mod:`grmc.engine.kernels`, its plain-Python twin in
:mod:`grmc.engine.oracle`; both read what this module prepares.

References
----------
D. T. Gillespie, "A general method for numerically simulating the stochastic time evolution
of coupled chemical reactions", J. Comput. Phys. 22, 403 (1976).
P. A. W. Lewis and G. S. Shedler, "Simulation of nonhomogeneous Poisson processes by
thinning", Naval Res. Logist. Q. 26, 403 (1979) (the modulated channel).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

__all__ = [
    "NO_CHANNEL",
    "SINE",
    "SQUARE",
    "KernelOptions",
    "KernelTables",
    "Modulation",
    "Outputs",
    "TrajectoryResult",
    "allocate_outputs",
    "allocate_work",
    "build_tables",
    "check_model",
    "kernel_arrays",
    "loop_tables",
    "make_options",
    "validate_inputs",
    "validate_options",
    "Work",
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


class KernelTables(NamedTuple):
    """The model in the form the event loop reads: one record, built once per model by
    :func:`build_tables` (it depends on the model only, not on the state).

    ``4 s`` is the index of species s in the loop's state array ``st`` (count, time
    integrated to, integral of x and of x^2 over the current bin: ``st[4 s + 0..3]``); one
    scratch species block follows the S real ones.  A "slot" is one distinct factor
    ``sign * x + offset`` (slot 0 is the constant 1.0 of an unused factor; one scratch slot
    follows the real ones).  Every channel has a record of the same length ``rec`` in
    ``itab`` and ``ftab`` (padded with no-op entries aimed at the scratch species, slot and
    propensity), so the loops of an event have fixed trip counts.

    Attributes
    ----------
    coefficient : float64[C]  k_r (for a modulated channel: its bound, see
        :func:`grmc.engine.kernels.simulate`) [s^-1 per product of counts]
    slot_st : uint64[n_slot]  State index 4 s of each slot's species
    slot_go : float64[2 n_slot]  Sign and offset of each slot
    fslot : uint64[3 C]  Slot of each factor of each channel (0 where unused)
    itab : uint64[C * rec]  Per channel: n_cols state indices 4 s of its changes; n_upd
        slots to update; n_dep dependents packed as ``q | i0 << 16 | i1 << 32 | i2 << 48``
        (the channel and its three slots)
    ftab : float64[C * rec]  Per channel: the n_cols changes [count]; the n_upd slot
        increments ``sign * change``; the n_dep coefficients of the dependents
    n_cols, n_upd, n_dep, rec : uint64  Entries of each kind per channel; rec their sum
    n_pad : int64  Propensity positions: C rounded up to a multiple of 4 (at least 4)
    """

    coefficient: np.ndarray
    slot_st: np.ndarray
    slot_go: np.ndarray
    fslot: np.ndarray
    itab: np.ndarray
    ftab: np.ndarray
    n_cols: np.uint64
    n_upd: np.uint64
    n_dep: np.uint64
    rec: np.uint64
    n_pad: np.int64


def _slots(factor_species, factor_sign, factor_offset, n_species: int):
    """The distinct factors ``(species, sign, offset)`` -> slot index, the slots' species
    state indices and (sign, offset) pairs, and each factor's slot (see KernelTables)."""
    n_channels = factor_species.shape[0]
    keys: dict[tuple[int, float, float], int] = {}
    slot_st, slot_go = [4 * n_species], [0.0, 1.0]
    fslot = np.zeros(3 * n_channels, dtype=np.uint64)
    for r in range(n_channels):
        for f in range(3):
            s = int(factor_species[r, f])
            if s < 0:
                continue
            key = (s, float(factor_sign[r, f]), float(factor_offset[r, f]))
            if key not in keys:
                keys[key] = len(slot_st)
                slot_st.append(4 * s)
                slot_go.extend(key[1:])
            fslot[3 * r + f] = keys[key]
    return keys, slot_st, slot_go, fslot


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
    dep_indptr = np.asarray(dep_indptr, dtype=np.int64)
    dep_indices = np.asarray(dep_indices, dtype=np.int64)
    coefficient = np.array(coefficient, dtype=np.float64)
    n_channels, n_species = stoich.shape
    n_pad = 4 * max(1, (n_channels + 3) // 4)
    keys, slot_st, slot_go, fslot = _slots(
        np.asarray(factor_species, dtype=np.int64), np.asarray(factor_sign, dtype=np.float64),
        np.asarray(factor_offset, dtype=np.float64), n_species)
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
    u64 = np.uint64
    return KernelTables(
        coefficient=coefficient, slot_st=np.array(slot_st, dtype=np.uint64),
        slot_go=np.array(slot_go, dtype=np.float64), fslot=fslot, itab=itab.ravel(),
        ftab=ftab.ravel(), n_cols=u64(n_cols), n_upd=u64(n_upd), n_dep=u64(n_dep),
        rec=u64(rec), n_pad=np.int64(n_pad))


class KernelOptions(NamedTuple):
    """The loop's options in one record; :func:`make_options` builds it, its "none" values
    (``mod_channel`` = :data:`NO_CHANNEL`, an empty ``flow_weight``) switch both off.

    Attributes
    ----------
    mod_channel : uint64  The modulated channel r (:data:`NO_CHANNEL`: none)
    mod_kind : int64  :data:`SINE` or :data:`SQUARE` (0 without a modulation)
    mod_w : float  ``(2.0 * pi) * frequency_Hz`` [rad/s]
    mod_depth : float  In [0, 1]
    mod_phase : float  [rad]
    flow_weight : float64[C] or float64[0]  Flow weight of each channel; empty: no flows
    """

    mod_channel: np.uint64
    mod_kind: np.int64
    mod_w: float
    mod_depth: float
    mod_phase: float
    flow_weight: np.ndarray


#: ``mod_channel`` of "no modulation": no channel has this index.
NO_CHANNEL = np.uint64(2**64 - 1)


#: Both options off (the empty flow weights stay writable, so the record has the same
#: numba type with and without options and the loop is compiled once).
_NO_OPTIONS = KernelOptions(NO_CHANNEL, np.int64(0), 0.0, 0.0, 0.0, np.zeros(0, np.float64))


def make_options(modulation: Modulation | None, flow_weight: np.ndarray | None
                 ) -> KernelOptions:
    """The :class:`KernelOptions` of checked options (:func:`validate_options`).

    The fields have the same types whatever is switched on, so the loop is compiled once.
    """
    if modulation is None and flow_weight is None:
        return _NO_OPTIONS
    fw = (np.zeros(0, dtype=np.float64) if flow_weight is None
          else np.array(flow_weight, dtype=np.float64, order="C"))
    if modulation is None:
        return KernelOptions(NO_CHANNEL, np.int64(0), 0.0, 0.0, 0.0, fw)
    return KernelOptions(np.uint64(modulation.channel), np.int64(modulation.kind),
                         (2.0 * math.pi) * modulation.frequency_Hz, modulation.depth,
                         modulation.phase_rad, fw)


class Work(NamedTuple):
    """The loop's work arrays (contents set by the loop; see :class:`KernelTables`).

    Attributes
    ----------
    st : float64[4 (S + 1)]  Per species: count, time integrated to, integrals of x and x^2
        over the current bin; then the scratch block
    slot : float64[n_slot + 1]  Value of each slot, then the scratch slot
    a : float64[n_pad + 1]  Propensities, zero padding, then the scratch entry [s^-1]
    order : uint64[n_pad]  The search order of the positions of ``a``
    """

    st: np.ndarray
    slot: np.ndarray
    a: np.ndarray
    order: np.ndarray


def allocate_work(tables: KernelTables, n_species: int) -> Work:
    """Work arrays of the event loop (contents set by the loop)."""
    return Work(np.zeros(4 * (n_species + 1), dtype=np.float64),
                np.ones(tables.slot_st.shape[0] + 1, dtype=np.float64),
                np.zeros(int(tables.n_pad) + 1, dtype=np.float64),
                np.zeros(int(tables.n_pad), dtype=np.uint64))


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
    """Check and convert the inputs of :func:`grmc.engine.kernels.simulate` (shared with the
    oracle).

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
    """Check and convert the optional ``modulation`` and ``flow_weight`` of
    :func:`grmc.engine.kernels.simulate` (shared with the oracle).

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


class Outputs(NamedTuple):
    """The arrays one trajectory's loop writes (as in :class:`TrajectoryResult`)."""

    samples: np.ndarray
    bins: np.ndarray
    integ: np.ndarray
    integ2: np.ndarray
    events: np.ndarray
    final: np.ndarray
    flows: np.ndarray


def allocate_outputs(n_species: int, n_channels: int, n_samples: int, oversample: int, *,
                     flows: bool = False) -> Outputs:
    """Zeroed output arrays of one trajectory.

    Returns
    -------
    Outputs
        samples, bins, integ, integ2, events, final and flows (shape (n_samples *
        oversample,) with ``flows``, else (0,)), as in :class:`TrajectoryResult`.
    """
    n_bins = n_samples * oversample
    return Outputs(np.zeros((n_samples, n_species), dtype=np.int64),
                   np.zeros((n_bins, n_species), dtype=np.float64),
                   np.zeros(n_species, dtype=np.float64),
                   np.zeros(n_species, dtype=np.float64),
                   np.zeros(n_channels, dtype=np.int64),
                   np.zeros(n_species, dtype=np.int64),
                   np.zeros(n_bins if flows else 0, dtype=np.float64))


def loop_tables(checked: dict, modulation: Modulation | None) -> KernelTables:
    """The tables the loop runs on: the model's own, or with a modulation those of the
    dominating process, the modulated channel's coefficient times ``1.0 + depth`` (one
    rounding; thinning, Lewis & Shedler 1979).

    Parameters
    ----------
    checked : dict  What :func:`validate_inputs` returns
    modulation : Modulation or None  From :func:`validate_options`
    """
    if modulation is None:
        return checked["tables"]
    coefficient = checked["coefficient"].copy()
    coefficient[modulation.channel] = coefficient[modulation.channel] * (1.0 + modulation.depth)
    return check_model(checked["stoich"], coefficient, checked["factor_species"],
                       checked["factor_sign"], checked["factor_offset"], checked["dep_indptr"],
                       checked["dep_indices"]).tables
