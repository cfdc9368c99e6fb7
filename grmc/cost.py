"""What a run will cost before it starts: events and memory, with warnings and refusals.

``grmc check`` lists :func:`cost_warnings`; ``grmc run`` and ``grmc demo`` call
:func:`refuse_absurd` first, so a run that could never finish (a 1e12-sample window, 1e12
trajectories, a 1e300 s window or settling time) is refused with the key named instead of
hanging.  The event count is the continuum event rate at the start state times the simulated
time; the memory is what the recording of one trajectory per worker and the per-trajectory
results of the ensemble hold at once.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .scenario import Scenario, ScenarioError

__all__ = ["Cost", "estimate", "run_cost", "cost_warnings", "refuse_absurd", "WARN_EVENTS",
           "REFUSE_EVENTS", "WARN_BYTES", "REFUSE_BYTES"]

#: Above this many events a run takes hours on one machine (at ~1e7-1e8 events/s per core).
WARN_EVENTS = 1.0e10
#: Above this many events a run would take months: refused.
REFUSE_EVENTS = 1.0e14
#: Memory above which ``check`` warns [bytes] (2 GiB).
WARN_BYTES = 2.0 * 2**30
#: Memory above which a run is refused [bytes] (64 GiB).
REFUSE_BYTES = 64.0 * 2**30


@dataclass(frozen=True)
class Cost:
    """The expected cost of a run.

    Attributes
    ----------
    event_rate_s : float  Events per second of one trajectory at the start state [1/s]
    settle_events : float  Events spent settling, all trajectories together [1]
    window_events : float  Events in the observation window, all trajectories [1]
    record_bytes : float  Fine-bin recording of one trajectory per worker [bytes]
    ensemble_bytes : float  Per-trajectory results kept for the whole ensemble [bytes]
    """

    event_rate_s: float
    settle_events: float
    window_events: float
    record_bytes: float
    ensemble_bytes: float

    @property
    def events(self) -> float:
        """All events of the run [1]."""
        return self.settle_events + self.window_events

    @property
    def memory_bytes(self) -> float:
        """Recording plus ensemble results [bytes]."""
        return self.record_bytes + self.ensemble_bytes


def estimate(scenario: Scenario, model, event_rate_s: float, *, trajectories: int | None = None,
             workers: int = 1) -> Cost:
    """The cost of running ``scenario``.

    Parameters
    ----------
    scenario : Scenario
    model : Model  Its model (for the number of species)
    event_rate_s : float  Total propensity at the start state [1/s]
    trajectories : int, optional  Override of ``[run] trajectories``
    workers : int  Trajectories recorded at once

    Returns
    -------
    Cost
    """
    from .simulate import OVERSAMPLE

    rs = scenario.run
    n = rs.trajectories if trajectories is None else int(trajectories)
    species = model.n_species
    # one trajectory's recording: the samples (int64) and the fine bins with their squares
    record = 8.0 * species * rs.samples * (1 + 2 * OVERSAMPLE) * max(1, workers)
    per_traj = species + len(scenario.traps) + 4
    if scenario.population is not None:  # band spectra and per-frequency noise per pixel
        per_traj += 2 * (len(scenario.population.frequencies_Hz) + 64)
    return Cost(
        event_rate_s=float(event_rate_s),
        settle_events=float(event_rate_s) * rs.settle_s * n,
        window_events=float(event_rate_s) * rs.duration_s * n,
        record_bytes=record,
        ensemble_bytes=8.0 * per_traj * n,
    )


def run_cost(scenario: Scenario, *, trajectories: int | None = None, workers: int = 1) -> Cost:
    """:func:`estimate` with the event rate of the continuum steady state's nearest
    neutral state (the state a run starts from), as ``grmc check`` reports it."""
    from . import continuum
    from .model import build_model
    from .scenario import check_counts

    check_counts(scenario)
    model = build_model(scenario)
    x0 = model.nearest_neutral_state(continuum.steady_state(model))
    rate = float(model.propensities(x0).sum())
    return estimate(scenario, model, rate, trajectories=trajectories, workers=workers)


def _event_key(cost: Cost) -> str:
    return "settle_s" if cost.settle_events > cost.window_events else "duration_s"


def _memory_key(cost: Cost) -> str:
    return "samples" if cost.record_bytes > cost.ensemble_bytes else "trajectories"


def cost_warnings(cost: Cost) -> list[str]:
    """Warnings for a long or large run, each naming the ``[run]`` key to change."""
    out = []
    if cost.events > WARN_EVENTS:
        verdict = "refused by run" if cost.events > REFUSE_EVENTS else "hours of computing"
        out.append(f"[run] {_event_key(cost)}: the run needs about {cost.events:.2g} events "
                   f"(more than {WARN_EVENTS:.0e}: {verdict}); shorten duration_s or "
                   "settle_s or use fewer trajectories")
    if cost.memory_bytes > WARN_BYTES:
        verdict = "refused by run" if cost.memory_bytes > REFUSE_BYTES else "check the machine"
        out.append(f"[run] {_memory_key(cost)}: the run needs about "
                   f"{cost.memory_bytes / 2**30:.3g} GiB of memory ({verdict}); use fewer "
                   "samples or trajectories")
    return out


def refuse_absurd(scenario: Scenario, cost: Cost) -> None:
    """Refuse a run that could not finish or not fit in memory.

    Raises
    ------
    ScenarioError  Naming the ``[run]`` key, when the events exceed :data:`REFUSE_EVENTS`
        or the memory :data:`REFUSE_BYTES`.
    """
    if not cost.events <= REFUSE_EVENTS:  # also catches inf and nan
        days = cost.events / 1e8 / 86400.0
        when = f"about {days:.2g} days at 1e8 events/s" if math.isfinite(days) else "forever"
        raise ScenarioError(scenario.source, "run", _event_key(cost),
                            f"the run needs about {cost.events:.2g} events ({when}); "
                            f"more than {REFUSE_EVENTS:.0e} is refused")
    if cost.memory_bytes > REFUSE_BYTES:
        raise ScenarioError(scenario.source, "run", _memory_key(cost),
                            f"the run needs about {cost.memory_bytes / 2**30:.3g} GiB of memory; "
                            f"more than {REFUSE_BYTES / 2**30:.0f} GiB is refused")
