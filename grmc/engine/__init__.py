"""The event engine: exact stochastic simulation of the generation-recombination channels.

Importing this package is cheap and imports no numba; the compiled parts are in submodules
that the caller imports when it needs them:

``grmc.engine.kernels``
    The one entry: ``simulate`` (public wrapper: validates, allocates, returns a
    ``TrajectoryResult``) calls ``run`` (the one compiled function: the model's tables in one
    record, the options in another, arrays in, arrays out); its event loop is a sequence of
    small compiled steps.
``grmc.engine.tables``
    The Python side: ``kernel_arrays`` (the plain arrays of a ``Model``), their checks, the
    tables and options records and the allocation of the loop's arrays.
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
