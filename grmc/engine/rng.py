"""xoshiro256++ random streams for the event kernels, and their plain-Python twins.

Each trajectory owns one stream: a state of four 64-bit words derived from the run's seed
and the trajectory's index through ``numpy.random.SeedSequence`` (so streams of different
indices are independent in the sense of SeedSequence's hashing), then advanced in place by
the kernel.  The generator is xoshiro256++ (Blackman & Vigna): four words of state, period
2^256 - 1, one 64-bit output per step from a handful of adds, shifts and xors, which keeps it
several times faster inside a numba loop than a numpy ``Generator``.

Uniform doubles are ``(x >> 11) * 2**-53``: the top 53 bits of an output, all multiples of
2^-53 in [0, 1), each equally likely.

Every jitted function has a plain-Python twin (``py_`` prefix) on Python ints masked to 64
bits, with exactly the same outputs; the oracle uses the twins.

References
----------
D. Blackman and S. Vigna, "Scrambled linear pseudorandom number generators",
ACM Trans. Math. Softw. 47, 36 (2021); reference code xoshiro256plusplus.c (prng.di.unimi.it).
M. E. O'Neill, numpy.random.SeedSequence (NumPy documentation, "Parallel random number
generation").
"""

from __future__ import annotations

import numpy as np

from ._jit import jit

__all__ = [
    "DOUBLE_UNIT",
    "next_double",
    "next_u64",
    "py_next_double",
    "py_next_u64",
    "stream_state",
    "xoshiro_step",
]

MASK64 = (1 << 64) - 1
#: 2^-53, the spacing of the uniform doubles [1].
DOUBLE_UNIT = 2.0**-53

_U17 = np.uint64(17)
_U23 = np.uint64(23)
_U41 = np.uint64(41)
_U45 = np.uint64(45)
_U19 = np.uint64(19)
_U11 = np.uint64(11)


def stream_state(seed: int, index: int, *, purpose: int = 0) -> np.ndarray:
    """The xoshiro256++ state of stream ``index`` of a run seeded with ``seed``.

    Parameters
    ----------
    seed : int
        The run's seed (>= 0).
    index : int
        Trajectory (or device) index (>= 0).
    purpose : int, keyword-only
        Separates streams of the same index used for different things (e.g. 0 for the event
        engine, 1 for drawing dopant counts) (>= 0).

    Returns
    -------
    ndarray of uint64, shape (4,)
        ``SeedSequence(seed, spawn_key=(index, purpose)).generate_state(4, uint64)``; never
        all zero (the one state xoshiro cannot leave).

    Raises
    ------
    ValueError
        For a negative seed, index or purpose.
    """
    for name, v in (("seed", seed), ("index", index), ("purpose", purpose)):
        if int(v) != v or v < 0:
            raise ValueError(f"{name} must be a non-negative integer, got {v!r}")
    ss = np.random.SeedSequence(int(seed), spawn_key=(int(index), int(purpose)))
    state = ss.generate_state(4, np.uint64)
    if not state.any():  # probability 2^-256; keep the stream well defined anyway
        state = ss.generate_state(8, np.uint64)[4:]
        if not state.any():
            state[0] = np.uint64(1)
    return np.ascontiguousarray(state, dtype=np.uint64)


# ------------------------------------------------------------------------------ compiled
@jit
def xoshiro_step(s0, s1, s2, s3):
    """One xoshiro256++ step on the state words held in registers.

    Returns ``(output, s0, s1, s2, s3)`` (all uint64).  The kernels keep the state in local
    variables and call this; :func:`next_u64` is the array form.
    """
    a = s0 + s3
    result = ((a << _U23) | (a >> _U41)) + s0
    t = s1 << _U17
    s2 = s2 ^ s0
    s3 = s3 ^ s1
    s1 = s1 ^ s2
    s0 = s0 ^ s3
    s2 = s2 ^ t
    s3 = (s3 << _U45) | (s3 >> _U19)
    return result, s0, s1, s2, s3


@jit
def u64_to_double(x):
    """``(x >> 11) * 2**-53`` in [0, 1) (exact: a 53-bit integer converts without rounding)."""
    return np.float64(np.int64(x >> _U11)) * DOUBLE_UNIT


@jit
def next_u64(state):
    """Next 64-bit output of the stream ``state`` (uint64[4], advanced in place)."""
    r, s0, s1, s2, s3 = xoshiro_step(state[0], state[1], state[2], state[3])
    state[0] = s0
    state[1] = s1
    state[2] = s2
    state[3] = s3
    return r


@jit
def next_double(state):
    """Next uniform double in [0, 1) of the stream ``state`` (advanced in place)."""
    return u64_to_double(next_u64(state))


@jit
def fill_u64(state, out):
    """Fill ``out`` (uint64[n]) with the next n outputs (advances ``state``)."""
    for i in range(out.shape[0]):
        out[i] = next_u64(state)


@jit
def fill_double(state, out):
    """Fill ``out`` (float64[n]) with the next n uniform doubles (advances ``state``)."""
    for i in range(out.shape[0]):
        out[i] = next_double(state)


# ------------------------------------------------------------------------------ Python twins
def py_step(s: list[int]) -> int:
    """Plain-Python xoshiro256++ step on a list of four ints (modified in place)."""
    s0, s1, s2, s3 = s
    a = (s0 + s3) & MASK64
    result = ((((a << 23) & MASK64) | (a >> 41)) + s0) & MASK64
    t = (s1 << 17) & MASK64
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = ((s3 << 45) & MASK64) | (s3 >> 19)
    s[0], s[1], s[2], s[3] = s0, s1, s2, s3
    return result


def py_u64_to_double(x: int) -> float:
    """Twin of :func:`u64_to_double`."""
    return float(x >> 11) * DOUBLE_UNIT


def py_state(state: np.ndarray) -> list[int]:
    """A uint64[4] state as a list of Python ints (for the twins)."""
    return [int(v) for v in np.asarray(state, dtype=np.uint64)]


def py_store(py: list[int], state: np.ndarray) -> None:
    """Write a twin state back into a uint64[4] array."""
    state[:] = np.array(py, dtype=np.uint64)


def py_next_u64(state: np.ndarray | list[int]) -> int:
    """Twin of :func:`next_u64`: a uint64[4] array or a list of ints, advanced in place."""
    if isinstance(state, list):
        return py_step(state)
    s = py_state(state)
    r = py_step(s)
    py_store(s, state)
    return r


def py_next_double(state: np.ndarray | list[int]) -> float:
    """Twin of :func:`next_double`."""
    return py_u64_to_double(py_next_u64(state))
