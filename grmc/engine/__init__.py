"""The event engine: exact stochastic simulation of the generation-recombination channels.

Importing this package is cheap and imports no numba; the compiled parts are in submodules
that the caller imports when it needs them:

``grmc.engine.kernels``
    ``simulate`` (public wrapper: validates, allocates, returns a ``TrajectoryResult``),
    ``run_trajectory`` (the jitted kernel: plain arrays in, arrays out) and ``kernel_arrays``
    (the plain arrays of a ``Model``).
``grmc.engine.oracle``
    A plain-Python twin of the kernel (same draw order, same floating-point operations),
    the reference the kernel is tested against.
``grmc.engine.rng``
    xoshiro256++ streams seeded through ``numpy.random.SeedSequence``.
``grmc.engine._jit``
    The one jit decorator and the choice of the compilation cache directory.
"""

from __future__ import annotations

__all__: list[str] = []
