"""grmc: exact stochastic generation-recombination noise in nanoscale semiconductor volumes.

Importing grmc compiles nothing and imports neither numba, xarray nor matplotlib; the public
functions import what they need when called.

Public API
----------
load_scenario(path=None, *, text=None) -> Scenario
build_model(scenario) -> Model
steady_state(model) -> ndarray            (continuum, under the charge constraint)
lna_covariance(model) -> ndarray          (linear-noise covariance)
run(scenario, ...) -> xarray.Dataset      (the ensemble, as ``grmc run`` writes it)

The continuum and linear-noise solvers are in :mod:`grmc.continuum` (``steady_state``,
``lna``), the exact solver in :mod:`grmc.exact`, and an output file is read with
:func:`grmc.result.open_result`.
"""

from __future__ import annotations

from ._version import __version__  # noqa: E402

from .model import Model, build_model  # noqa: E402
from .scenario import Scenario, ScenarioError, load_scenario  # noqa: E402


def run(scenario: Scenario, **options):
    """Run the ensemble of a scenario and return the output ``xarray.Dataset``.

    The same as ``grmc run`` without writing a file; options as in
    :func:`grmc.simulate.run` (``trajectories``, ``seed``, ``workers``, ``progress``,
    ``accuracy``, ``band_Hz``, ``max_seconds``, and ``runner`` from
    :func:`grmc.distributed.open_runner` for a Dask cluster or parts kept for a resume).
    """
    from .simulate import run as _run

    return _run(scenario, **options)


__all__ = [
    "__version__",
    "run",
    "Scenario",
    "ScenarioError",
    "Model",
    "load_scenario",
    "build_model",
]
