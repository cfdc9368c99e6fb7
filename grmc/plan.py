"""The plan of a run: everything decided once from the scenario before any trajectory runs.

A :class:`Plan` holds the model of the nominal device (and a cache of per-pixel models when
dopant counts are drawn), the start state, the output grid (samples, fine bins, segments),
the readout's scale factors, how each trajectory is cut into engine calls, the pixel bands
and the jackknife grouping.  It is plain data: it pickles, so a chunk of trajectories can be
reduced in another process (:func:`grmc.chunk.reduce_chunk`), and it depends on the scenario
and seed only, never on the number of workers or on how many rounds a run takes.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from . import continuum, population, spectra
from .model import Counts, Model, build_model, draw_counts, nominal_counts, with_every_trap
from .scenario import Scenario, ScenarioError

__all__ = ["OVERSAMPLE", "N_BATCHES", "CHUNK_TRAJECTORIES", "Plan", "Prepared", "SlicePlan",
           "make_plan", "prepare", "start_state"]

#: Fine bins per output sample interval recorded by the engine for the spectra (see
#: :func:`grmc.spectra.periodogram` for why the spectrum is estimated at a finer rate).
OVERSAMPLE = 8
#: Batches used for the standard error when the ensemble has a single trajectory.
N_BATCHES = 16
#: Trajectories per chunk: chunk k holds trajectories 4k .. 4k + 3, whatever the ensemble
#: size, so that rounds (multiples of 16 trajectories) cut the same chunks as one pass.
CHUNK_TRAJECTORIES = 4
#: Stream purposes spawned from (seed, trajectory): 0 the event engine, 1 dopant draws.
PURPOSE_ENGINE, PURPOSE_DOPANTS = 0, 1


def start_state(model: Model, steady: np.ndarray | None = None) -> np.ndarray:
    """The integer neutral state nearest to the continuum steady state [count]."""
    if steady is None:
        steady = continuum.steady_state(model)
    return model.nearest_neutral_state(steady)


@dataclass
class Prepared:
    """A model with the plain arrays the kernel takes and its start state."""

    model: Model
    arrays: tuple
    x0: np.ndarray
    steady: np.ndarray  # continuum steady state [count]
    channel_map: np.ndarray  # this model's channel index -> index in the full channel list


def prepare(model: Model, index: dict[str, int] | None = None) -> Prepared:
    """Kernel arrays, start state and channel map of one model."""
    from .engine.kernels import kernel_arrays

    if index is None:
        index = {name: i for i, name in enumerate(model.channel_names)}
    cmap = np.array([index[n] for n in model.channel_names], dtype=np.int64)
    steady = continuum.steady_state(model)
    return Prepared(model, kernel_arrays(model), start_state(model, steady), steady, cmap)


class ModelCache:
    """Models by dopant/trap counts (a population draws many devices with equal counts).

    Thread-safe; pickles without its lock (a copy in another process starts its own).
    """

    def __init__(self, scenario: Scenario, all_names: tuple[str, ...]):
        self.scenario = scenario
        self.index = {name: i for i, name in enumerate(all_names)}
        self.lock = threading.Lock()
        self.cache: dict[Counts, Prepared] = {}

    def __getstate__(self):
        return {k: v for k, v in self.__dict__.items() if k != "lock"}

    def __setstate__(self, state):
        self.__dict__.update(state)
        self.lock = threading.Lock()

    def get(self, counts: Counts) -> Prepared:
        with self.lock:
            hit = self.cache.get(counts)
        if hit is not None:
            return hit
        prepared = prepare(build_model(self.scenario, counts=counts), self.index)
        with self.lock:
            self.cache[counts] = prepared
        return prepared


@dataclass(frozen=True)
class SlicePlan:
    """How one trajectory is cut into consecutive engine calls."""

    settle_slices: int
    window_slices: int

    @property
    def units(self) -> int:
        """Progress units (engine calls) per trajectory."""
        return self.settle_slices + self.window_slices


def slice_plan(base: Prepared, rs, slice_events: float) -> SlicePlan:
    """Cut long trajectories into time slices of about ``slice_events`` events.

    The event loop is memoryless, so continuing a trajectory from the state and random
    stream where the previous slice stopped is exact.  Slices let Ctrl-C stop a run within
    about a second and let the progress bar move during a single long trajectory.  The plan
    depends on the scenario only (the expected event rate at the start state), never on the
    number of workers, so the data stay identical whatever ``workers`` is.  Window slices
    divide ``samples`` evenly.
    """
    rate = float(base.model.propensities(base.x0).sum())
    settle = max(1, math.ceil(rate * rs.settle_s / slice_events)) if rs.settle_s > 0 else 0
    want = max(1, math.ceil(rate * rs.duration_s / slice_events))
    divisors = [d for d in range(1, rs.samples + 1) if rs.samples % d == 0]
    window = next((d for d in divisors if d >= want), rs.samples)
    return SlicePlan(settle, window)


@dataclass(frozen=True)
class Plan:
    """Everything a chunk of trajectories needs, decided once from the scenario.

    Attributes
    ----------
    scenario : Scenario  As run (overrides applied)
    seed : int  Seed of every stream
    segments : int  Periodogram segments per trajectory [1]
    dt_fine : float  Fine bin width [s]
    ref : ndarray  Start state of the nominal device on the output species, the shift for
        safe sums of squares [count]
    excess : ndarray  Pairs added at t = 0 per model species [count]
    a_e, a_h : float  Readout current per electron and per hole [A]
    current : bool  Whether the scenario has a readout
    names : tuple of str  Channel names of the full channel list (every trap level present)
    flow_weight : ndarray  Flow of each channel of the full list (collection events)
    base : Prepared  The nominal device
    slices : SlicePlan  Engine calls per trajectory
    bands : PixelBands or None  Per-pixel bands of a population run
    jackknife : int  Jackknife groups (trajectory i is in group i mod ``jackknife``); 0 for
        none
    models : ModelCache  Per-pixel models (``dopants = "poisson"``)
    """

    scenario: Scenario
    seed: int
    segments: int
    dt_fine: float
    ref: np.ndarray
    excess: np.ndarray
    a_e: float
    a_h: float
    current: bool
    names: tuple
    flow_weight: np.ndarray
    base: Prepared
    slices: SlicePlan
    bands: population.PixelBands | None
    jackknife: int
    models: ModelCache

    @property
    def run(self):
        """The scenario's ``[run]`` settings."""
        return self.scenario.run

    @property
    def species(self) -> tuple[str, ...]:
        """The output species every accumulator holds: the model's species, with a spread
        trap level's total ``trapped:<label>`` beside its sub-levels
        (:attr:`grmc.model.Model.output_species`)."""
        return self.base.model.output_species

    @property
    def poisson(self) -> bool:
        return self.scenario.run.dopants == "poisson"

    @property
    def frequencies(self) -> np.ndarray:
        """Frequencies of the averaged periodogram [Hz]."""
        rs = self.scenario.run
        return spectra.periodogram_frequencies(rs.samples, rs.duration_s,
                                               segments=self.segments, oversample=OVERSAMPLE)

    def group(self, i: int) -> int | None:
        """Jackknife group of trajectory ``i``: i mod G (None without groups)."""
        return i % self.jackknife if self.jackknife else None

    def pixel_counts(self, i: int) -> Counts:
        """Dopant and trap counts of trajectory ``i`` (its own stream, purpose 1)."""
        rng = np.random.default_rng(np.random.SeedSequence(self.seed,
                                                           spawn_key=(i, PURPOSE_DOPANTS)))
        return draw_counts(self.scenario, rng)

    def check_pixels(self, start: int, stop: int) -> None:
        """Refuse drawn pixels ``start .. stop - 1`` that the reservoir's pair exchange does
        not allow (before they are simulated)."""
        if self.poisson and self.scenario.reservoir is not None:
            check_pixels(self.scenario, (self.pixel_counts(i) for i in range(start, stop)),
                         first=start)

    def device(self, i: int) -> Prepared:
        """The prepared model of trajectory ``i``."""
        return self.models.get(self.pixel_counts(i)) if self.poisson else self.base


def jackknife_groups(trajectories: int) -> int:
    """Number of equal groups of trajectories for jackknife fit errors: the largest divisor
    of ``trajectories`` from 8 to 16 (16 groups gave well-calibrated corner errors on
    telegraph signals), or 0 when there is none.

    Trajectory i belongs to group i mod G.  A run in rounds starts with a multiple of 16
    trajectories and doubles, so G = 16 throughout and the groups of the rounds merge
    exactly into those of a run of the final count."""
    for g in range(16, 7, -1):
        if trajectories % g == 0:
            return g
    return 0


def trajectory_chunks(start: int, stop: int) -> list[range]:
    """Chunks of trajectories ``start .. stop - 1``, aligned on multiples of
    :data:`CHUNK_TRAJECTORIES` (they depend on the indices only, never on the workers or the
    ensemble size).  Merged in order, their sums are those of one pass over any larger range
    whose bounds are multiples of the chunk size."""
    c = CHUNK_TRAJECTORIES
    edges = [start, *range((start // c + 1) * c, stop, c), stop]
    return [range(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def check_pixels(scenario: Scenario, draws, *, first: int = 0) -> None:
    """Refuse, before any simulation, a population in which some pixel's drawn counts do not
    allow the reservoir's pair exchange (:func:`grmc.model.build_model`)."""
    seen: set[Counts] = set()
    for i, counts in enumerate(draws, start=first):
        if counts in seen:
            continue
        seen.add(counts)
        try:
            build_model(scenario, counts=counts)
        except ScenarioError as exc:
            raise ScenarioError(exc.source, exc.section, exc.key,
                                f"pixel {i} of the population (dopants = \"poisson\"): "
                                f"{exc.message}") from None


def _all_channels(scenario: Scenario, counts: Counts) -> Model:
    """The scenario's model with every trap level (and sub-level) present: the channel names
    (and flows) of a population run."""
    return build_model(scenario, counts=with_every_trap(scenario, counts), check_type=False)


def make_plan(scenario: Scenario, *, slice_events: float) -> Plan:
    """Plan a run of ``scenario`` (its ``[run]`` settings as they stand).

    Parameters
    ----------
    scenario : Scenario  With every override applied
    slice_events : float  Events per engine call when a trajectory is cut [1]

    Returns
    -------
    Plan

    Raises
    ------
    ScenarioError
        A drawn pixel that the model refuses (checked for the first round's trajectories).
    """
    rs = scenario.run
    counts0 = nominal_counts(scenario)
    every = _all_channels(scenario, counts0)
    models = ModelCache(scenario, every.channel_names)
    base = models.get(counts0)
    S = base.model.n_species
    excess = np.zeros(S, dtype=np.int64)
    excess[0] = excess[1] = scenario.start.excess_pairs
    segments = spectra.choose_segments(rs.trajectories, rs.samples)
    readout = scenario.readout
    a_e, a_h = spectra.current_scale(readout) if readout is not None else (0.0, 0.0)
    bands = None
    if scenario.population is not None:
        bands = population.pixel_bands(spectra.periodogram_frequencies(
            rs.samples, rs.duration_s, segments=segments, oversample=OVERSAMPLE))
    plan = Plan(
        scenario=scenario, seed=int(rs.seed), segments=segments,
        dt_fine=rs.duration_s / (rs.samples * OVERSAMPLE),
        ref=base.model.project(base.x0.astype(np.float64)), excess=excess, a_e=a_e, a_h=a_h,
        current=readout is not None, names=every.channel_names,
        flow_weight=np.asarray(every.flow_weight), base=base,
        slices=slice_plan(base, rs, slice_events), bands=bands,
        jackknife=jackknife_groups(rs.trajectories), models=models)
    plan.check_pixels(0, rs.trajectories)
    return plan
