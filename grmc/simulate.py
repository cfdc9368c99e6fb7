"""``grmc run``: scenario -> model -> ensemble of exact trajectories -> Dataset.

This module glues the pieces together: it builds the model (per trajectory when dopant
counts are drawn), starts every trajectory from the integer neutral state nearest to the
continuum steady state, runs the compiled engine over chunks of trajectories, reduces each
trajectory at once (so memory does not grow with the ensemble), and assembles the output
Dataset with the continuum and linear-noise answers beside the Monte Carlo ones.
"""

from __future__ import annotations

import dataclasses
import math
import threading
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from . import continuum, population, spectra
from .dataset import finish
from .engine.ensemble import Cancelled, chunk_bounds, map_chunks
from .model import (
    ELEMENTARY_CHARGE_C,
    Counts,
    Model,
    build_model,
    draw_counts,
    nominal_counts,
)
from .readout import current_gradient, describe_current, lna_current
from .scenario import Scenario, ScenarioError

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = ["run", "OVERSAMPLE", "Prepared", "prepare", "start_state"]

#: Fine bins per output sample interval recorded by the engine for the spectra (see
#: :func:`grmc.spectra.periodogram` for why the spectrum is estimated at a finer rate).
OVERSAMPLE = 8
#: Batches used for the standard error when the ensemble has a single trajectory.
N_BATCHES = 16
#: Largest span of count values kept in the stationary histogram.
MAX_HISTOGRAM_SPAN = 4096
#: Events per engine call when a trajectory is cut into time slices (about a second).
SLICE_EVENTS = 2.0e7
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


class _ModelCache:
    """Models by dopant/trap counts (a population draws many devices with equal counts)."""

    def __init__(self, scenario: Scenario, all_names: tuple[str, ...]):
        self.scenario = scenario
        self.index = {name: i for i, name in enumerate(all_names)}
        self.lock = threading.Lock()
        self.cache: dict[Counts, Prepared] = {}

    def get(self, counts: Counts) -> Prepared:
        with self.lock:
            hit = self.cache.get(counts)
        if hit is not None:
            return hit
        prepared = prepare(build_model(self.scenario, counts=counts), self.index)
        with self.lock:
            self.cache[counts] = prepared
        return prepared


def prepare(model: Model, index: dict[str, int] | None = None) -> Prepared:
    """Kernel arrays, start state and channel map of one model."""
    from .engine.kernels import kernel_arrays

    if index is None:
        index = {name: i for i, name in enumerate(model.channel_names)}
    cmap = np.array([index[n] for n in model.channel_names], dtype=np.int64)
    steady = continuum.steady_state(model)
    return Prepared(model, kernel_arrays(model), start_state(model, steady), steady, cmap)


def _check_pixels(scenario: Scenario, draws) -> None:
    """Refuse, before any simulation, a population in which some pixel's drawn counts do not
    allow the reservoir's pair exchange (:func:`grmc.model.build_model`)."""
    seen: set[Counts] = set()
    for i, counts in enumerate(draws):
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
    """The scenario's model with every trap level present: the channel names (and flows) of
    a population run."""
    full = dataclasses.replace(counts, traps=tuple(max(t, 1) for t in counts.traps))
    return build_model(scenario, counts=full, check_type=False)


@dataclass
class _Acc:
    """Reductions of one chunk of trajectories."""

    n: int = 0
    sum_x: np.ndarray | None = None
    sum_x2: np.ndarray | None = None
    events: np.ndarray | None = None
    psd: np.ndarray | None = None
    current_psd: np.ndarray | None = None
    hist: dict = field(default_factory=dict)
    group_psd: dict = field(default_factory=dict)  # jackknife group -> psd sum
    group_current_psd: dict = field(default_factory=dict)
    traj: list = field(default_factory=list)  # (index, mean, meansq, batch means, counts)
    quad: list = field(default_factory=list)  # (index, (2, S) quadratures, (2,) current's)
    charge: float = 0.0  # readout charge passed, all trajectories [C]
    pixels: list = field(default_factory=list)  # (index, mean readout, banded spectrum)
    n_events: int = 0


def run(
    scenario: Scenario,
    *,
    trajectories: int | None = None,
    seed: int | None = None,
    workers: int | None = None,
    progress: bool | None = None,
    command: str | None = None,
) -> xr.Dataset:
    """Run the ensemble of a scenario and return the output Dataset.

    Parameters
    ----------
    scenario : Scenario
    trajectories : int, optional  Override ``[run] trajectories``
    seed : int, optional  Override ``[run] seed``
    workers : int, optional  Threads (default: all cores); the data do not depend on it
    progress : bool, optional  Progress bar: True, False, or None (only on a terminal)
    command : str, optional  Command line recorded in ``history``

    Returns
    -------
    xarray.Dataset  The variables of the output contract (see :mod:`grmc.dataset`).

    Raises
    ------
    KeyboardInterrupt
        When interrupted; nothing is returned or written.
    """
    import xarray as xr

    from .engine.kernels import simulate as simulate_trajectory
    from .engine.rng import stream_state

    changes = {}
    if trajectories is not None:
        changes["trajectories"] = int(trajectories)
    if seed is not None:
        changes["seed"] = int(seed)
    if changes:
        scenario = dataclasses.replace(scenario, run=dataclasses.replace(scenario.run, **changes))
    rs = scenario.run
    n_traj, n_samples, duration = rs.trajectories, rs.samples, rs.duration_s
    poisson = rs.dopants == "poisson"

    counts0 = nominal_counts(scenario)
    every = _all_channels(scenario, counts0)
    names = every.channel_names
    cache = _ModelCache(scenario, names)
    base = cache.get(counts0)
    model0 = base.model
    S = model0.n_species
    ref = base.x0.astype(np.float64)  # shift for numerically safe sums of squares
    excess = np.zeros(S, dtype=np.int64)
    excess[0] = excess[1] = scenario.start.excess_pairs
    segments = spectra.choose_segments(n_traj, n_samples)
    dt_fine = duration / (n_samples * OVERSAMPLE)
    readout = scenario.readout
    a_e, a_h = spectra.current_scale(readout) if readout is not None else (0.0, 0.0)

    plan = _slice_plan(base, rs)
    bands = None
    if scenario.population is not None:
        bands = population.pixel_bands(spectra.periodogram_frequencies(
            n_samples, duration, segments=segments, oversample=OVERSAMPLE))
    n_groups = _jackknife_groups(n_traj)
    group_size = n_traj // n_groups if n_groups else 0

    def pixel_counts(i: int) -> Counts:
        rng = np.random.default_rng(np.random.SeedSequence(rs.seed,
                                                           spawn_key=(i, PURPOSE_DOPANTS)))
        return draw_counts(scenario, rng)

    if poisson and scenario.reservoir is not None:
        _check_pixels(scenario, (pixel_counts(i) for i in range(n_traj)))

    def work(chunk: range, cancel: threading.Event, tick) -> _Acc:
        acc = _Acc()
        for i in chunk:
            if poisson:
                prep = cache.get(pixel_counts(i))
            else:
                prep = base
            res = _simulate_sliced(simulate_trajectory, prep,
                                   stream_state(rs.seed, i, purpose=PURPOSE_ENGINE), rs,
                                   excess, plan, cancel, tick)
            _reduce_one(acc, i, res, prep, ref, dt_fine, segments, a_e, a_h, len(names),
                        readout is not None, None if n_groups is None else i // group_size,
                        bands)
        return acc

    t0 = time.perf_counter()
    parts = map_chunks(work, chunk_bounds(n_traj), workers=workers, progress=progress,
                       units_per_item=plan.settle_slices + plan.window_slices)
    wall = time.perf_counter() - t0
    acc = _combine(parts)

    # ------------------------------------------------------------ ensemble statistics
    n = acc.n
    mean_t = acc.sum_x / n + ref
    var_t = ((acc.sum_x2 - acc.sum_x**2 / n) / (n - 1)) if n > 1 else np.full_like(mean_t, np.nan)
    acc.traj.sort(key=lambda row: row[0])
    tmean = np.array([row[1] for row in acc.traj])
    tmsq = np.array([row[2] for row in acc.traj])
    st_mean = tmean.mean(axis=0)
    st_var = np.maximum(tmsq.mean(axis=0) - st_mean**2, 0.0)  # rounding can dip below 0
    per_var = tmsq - 2.0 * st_mean * tmean + st_mean**2  # each trajectory's about the pooled
    if n > 1:
        st_err = tmean.std(axis=0, ddof=1) / np.sqrt(n)
        var_err = per_var.std(axis=0, ddof=1) / np.sqrt(n)
    else:
        batches = acc.traj[0][3]
        st_err = batches.std(axis=0, ddof=1) / np.sqrt(len(batches))
        var_err = np.full(S, np.nan)

    # ------------------------------------------------------------ continuum and noise theory
    ss = base.steady
    lna = continuum.lna(model0)
    t = np.arange(n_samples) * (duration / n_samples)
    x_cont = continuum.transient(model0, mean_t[0], t).T
    freqs = spectra.periodogram_frequencies(n_samples, duration, segments=segments,
                                            oversample=OVERSAMPLE)
    smat = continuum.lna_psd(model0, freqs)
    psd_lna = np.real(np.einsum("iif->if", smat))

    k_total = n * segments
    psd = acc.psd / n
    psd_low, psd_high = spectra.welch_interval(psd, k_total)

    species = list(model0.species)
    data = {
        "count_mean": (("species", "t"), mean_t.T),
        "count_var": (("species", "t"), var_t.T),
        "count_continuum": (("species", "t"), x_cont),
        "stationary_mean": (("species",), st_mean),
        "stationary_mean_stderr": (("species",), st_err),
        "stationary_var": (("species",), st_var),
        "stationary_var_stderr": (("species",), var_err),
        "steady_continuum": (("species",), ss),
        "var_lna": (("species",), np.diag(lna.covariance).copy()),
        "relaxation_time_lna": (("mode",), np.asarray(lna.relaxation_times, dtype=float)),
        "psd": (("species", "frequency"), psd),
        "psd_low": (("species", "frequency"), psd_low),
        "psd_high": (("species", "frequency"), psd_high),
        "psd_lna": (("species", "frequency"), psd_lna),
        "events": (("channel",), acc.events),
        "event_rate": (("channel",), acc.events / (n * duration)),
        "trajectory_mean": (("realization", "species"), tmean),
    }
    groups = _groups(acc.group_psd, group_size)
    fits = [spectra.analyse_spectrum(freqs, psd[s], psd_low[s], psd_high[s], k_total,
                                     batches=None if groups is None else groups[:, s])
            for s in range(S)]
    data.update(_fit_vars(fits, prefix="", species_dim=True))
    if readout is not None:
        cur_psd = acc.current_psd / n
        c_low, c_high = spectra.welch_interval(cur_psd, k_total)
        data["current_mean"] = ((), acc.charge / (n * duration))
        data["current_psd"] = (("frequency",), cur_psd)
        data["current_psd_low"] = (("frequency",), c_low)
        data["current_psd_high"] = (("frequency",), c_high)
        theory = lna_current(model0, freqs, smat=smat, x=ss)
        data["current_psd_lna"] = (("frequency",), theory.psd)
        data["current_mean_continuum"] = ((), theory.mean)
        cgroups = _groups(acc.group_current_psd, group_size)
        # with collection events the spectrum sits on the white shot noise of the crossings,
        # 2 q^2 sum_r flow_r^2 (events_r per second) = 2 q (I_out + I_in) (Schottky 1918), the
        # measured rates standing for <a_r>: the Lorentzian analysis is of the G-R part above
        shot = 0.0
        if readout.collection == "events":
            crossings = (np.asarray(every.flow_weight, float) ** 2) @ (acc.events / (n * duration))
            shot = 2.0 * ELEMENTARY_CHARGE_C**2 * float(crossings)
            data["current_shot_noise"] = ((), shot)
        band = None
        if readout.collection == "events":  # fit where the G-R part stands above the shot floor
            above = freqs[(data["current_psd_lna"][1] - shot) > 2.0 * shot]
            band = (freqs[0], above.max()) if above.size else None
        cfit = spectra.analyse_spectrum(freqs, cur_psd - shot, c_low - shot, c_high - shot,
                                        k_total, band=band, batches=None if cgroups is None
                                        else cgroups - shot)
        data.update(_fit_vars([cfit], prefix="current_", species_dim=False))
        if readout.band_Hz is not None:  # rms noise in the readout band, with the theory's
            from .bandnoise import band_variables

            data.update(band_variables(
                freqs, cur_psd, readout.band_Hz, low=c_low, high=c_high,
                lna=lambda f: lna_current(model0, f).psd))

    if model0.modulation is not None:
        data.update(_response_vars(acc, model0, readout is not None))

    hist = _histogram(acc.hist, S)
    coords = {
        "t": ("t", t),
        "species": ("species", np.array(species, dtype=object)),
        "frequency": ("frequency", freqs),
        "channel": ("channel", np.array(names, dtype=object)),
        "realization": ("realization", np.arange(n, dtype=np.int64)),
    }
    if hist is not None:
        values, probs = hist
        data["count_histogram"] = (("species", "count_value"), probs)
        coords["count_value"] = ("count_value", values)
    if poisson:
        cnt = [row[4] for row in acc.traj]
        data["donors"] = (("realization",), np.array([c.donors for c in cnt], dtype=np.int64))
        data["acceptors"] = (("realization",), np.array([c.acceptors for c in cnt],
                                                        dtype=np.int64))
        if scenario.traps:
            data["trap_count"] = (("realization", "trap_level"),
                                  np.array([c.traps for c in cnt], dtype=np.int64))
            coords["trap_level"] = ("trap_level",
                                    np.array([tr.label for tr in scenario.traps], dtype=object))

    if bands is not None:
        pdata, pcoords = _population_vars(acc, bands, scenario, readout, cache)
        data.update(pdata)
        coords.update(pcoords)

    ds = xr.Dataset(data, coords=coords)
    attrs = {
        "seed": int(rs.seed),
        "trajectories": int(n),
        "volume_cm3": float(scenario.volume.volume_cm3),
        "duration_s": float(duration),
        "settle_s": float(rs.settle_s),
        "excess_pairs": int(scenario.start.excess_pairs),
        "samples": int(n_samples),
        "dopants": rs.dopants,
        "psd_segments_per_trajectory": int(segments),
        "psd_segments": int(k_total),
        "psd_oversample": int(OVERSAMPLE),
        "events_total": int(acc.n_events),
        "wall_time_s": float(wall),
        "donors_nominal": int(counts0.donors),
        "acceptors_nominal": int(counts0.acceptors),
        "conserved_charge": int(model0.charge),
        "population_threshold": (float(scenario.population.threshold)
                                 if scenario.population and scenario.population.threshold
                                 else None),
    }
    if readout is not None:
        attrs.update({
            "readout_bias_V": readout.bias_V,
            "readout_length_cm": readout.length_cm,
            "readout_electron_mobility_cm2_Vs": readout.electron_mobility_cm2_Vs,
            "readout_hole_mobility_cm2_Vs": readout.hole_mobility_cm2_Vs,
            "readout_current": describe_current(model0),
        })
    for tr, total in zip(scenario.traps, counts0.traps):
        attrs[f"trap_count_{tr.label}"] = int(total)
    return finish(ds, title=scenario.title, scenario_toml=scenario.text, command=command, **attrs)


@dataclass(frozen=True)
class _SlicePlan:
    """How one trajectory is cut into consecutive engine calls."""

    settle_slices: int
    window_slices: int


def _slice_plan(base: Prepared, rs) -> _SlicePlan:
    """Cut long trajectories into time slices of about :data:`SLICE_EVENTS` events.

    The event loop is memoryless, so continuing a trajectory from the state and random
    stream where the previous slice stopped is exact.  Slices let Ctrl-C stop a run within
    about a second and let the progress bar move during a single long trajectory.  The plan
    depends on the scenario only (the expected event rate at the start state), never on the
    number of workers, so the data stay identical whatever ``workers`` is.  Window slices
    divide ``samples`` evenly.
    """
    rate = float(base.model.propensities(base.x0).sum())
    settle = max(1, math.ceil(rate * rs.settle_s / SLICE_EVENTS)) if rs.settle_s > 0 else 0
    want = max(1, math.ceil(rate * rs.duration_s / SLICE_EVENTS))
    divisors = [d for d in range(1, rs.samples + 1) if rs.samples % d == 0]
    window = next((d for d in divisors if d >= want), rs.samples)
    return _SlicePlan(settle, window)


def _modulation_at(prep: Prepared, t_start: float) -> dict:
    """The engine's ``modulation`` argument for a call whose clock starts at window time
    ``t_start`` (the drive's phase carried over, so slices join into one waveform)."""
    mod = prep.model.modulation
    if mod is None:
        return {}
    channel, kind, freq, depth, phase = mod
    return {"modulation": (channel, kind, freq, depth,
                           math.fmod(phase + 2.0 * math.pi * freq * t_start, 2.0 * math.pi))}


def _flows_of(prep: Prepared) -> dict:
    """The engine's ``flow_weight`` argument where the model has collection channels."""
    w = prep.model.flow_weight
    return {"flow_weight": w} if np.any(w) else {}


class _Joined:
    """A trajectory assembled from time slices (the fields the reductions read)."""

    def __init__(self, parts):
        self.samples = np.concatenate([p.samples for p in parts])
        self.bins = np.concatenate([p.bins for p in parts])
        self.integ = np.sum([p.integ for p in parts], axis=0)
        self.integ2 = np.sum([p.integ2 for p in parts], axis=0)
        self.events = np.sum([p.events for p in parts], axis=0)
        self.final = parts[-1].final
        self.flows = np.concatenate([p.flows for p in parts])


def _simulate_sliced(simulate_trajectory, prep: Prepared, rng_state: np.ndarray, rs, excess,
                     plan: _SlicePlan, cancel: threading.Event, tick):
    """One trajectory as consecutive engine calls (see :func:`_slice_plan`)."""
    x = prep.x0
    zero = np.zeros_like(excess)
    # a short settling runs inside the first window call (the kernel's own settle phase);
    # a long one in slices of its own, whose records are discarded
    settle_first = rs.settle_s if plan.settle_slices == 1 else 0.0
    for k in range(plan.settle_slices if plan.settle_slices > 1 else 0):
        if cancel.is_set():
            raise Cancelled
        x = simulate_trajectory(*prep.arrays, x0=x, rng_state=rng_state, settle_s=0.0,
                                excess=zero, duration_s=rs.settle_s / plan.settle_slices,
                                n_samples=1, oversample=1, **_flows_of(prep),
                                **_modulation_at(prep, -rs.settle_s + k * rs.settle_s
                                                 / plan.settle_slices)).final
        tick(1)
    parts = []
    n = rs.samples // plan.window_slices
    for k in range(plan.window_slices):
        if cancel.is_set():
            raise Cancelled
        res = simulate_trajectory(*prep.arrays, x0=x, rng_state=rng_state,
                                  settle_s=settle_first if k == 0 else 0.0,
                                  excess=excess if k == 0 else zero,
                                  duration_s=rs.duration_s / plan.window_slices, n_samples=n,
                                  oversample=OVERSAMPLE, **_flows_of(prep),
                                  **_modulation_at(prep, k * rs.duration_s / plan.window_slices))
        x = res.final
        parts.append(res)
        tick(1 + (k == 0 and plan.settle_slices == 1))
    return parts[0] if len(parts) == 1 else _Joined(parts)


def _current_bins(res, dt_fine: float, a_e: float, a_h: float) -> np.ndarray:
    """The readout current averaged over each fine bin [A]: from the collection events where
    the engine recorded them (shot noise included), else from the counts."""
    if res.flows.size:
        return res.flows * (ELEMENTARY_CHARGE_C / dt_fine)
    return a_e * res.bins[:, 0] + a_h * res.bins[:, 1]


def _reduce_one(acc: _Acc, i: int, res, prep: Prepared, ref: np.ndarray, dt_fine: float,
                segments: int, a_e: float, a_h: float, n_channels: int, current: bool,
                group: int | None, bands=None) -> None:
    """Fold one trajectory into a chunk's reductions."""
    x = res.samples.astype(np.float64) - ref
    duration = dt_fine * res.bins.shape[0]
    if acc.n == 0:
        acc.sum_x = np.zeros_like(x)
        acc.sum_x2 = np.zeros_like(x)
        acc.events = np.zeros(n_channels, dtype=np.int64)
    acc.n += 1
    acc.sum_x += x
    acc.sum_x2 += x * x
    np.add.at(acc.events, prep.channel_map, res.events)
    acc.n_events += int(res.events.sum())
    _, pxx = spectra.periodogram(res.bins, dt_fine, oversample=OVERSAMPLE, segments=segments)
    acc.psd = pxx if acc.psd is None else acc.psd + pxx
    if group is not None:
        acc.group_psd[group] = acc.group_psd[group] + pxx if group in acc.group_psd else pxx
    if current:
        i_bins = _current_bins(res, dt_fine, a_e, a_h)
        acc.charge += float(i_bins.sum()) * dt_fine
        _, pii = spectra.periodogram(i_bins, dt_fine, oversample=OVERSAMPLE, segments=segments)
        acc.current_psd = pii if acc.current_psd is None else acc.current_psd + pii
        if group is not None:
            acc.group_current_psd[group] = (acc.group_current_psd[group] + pii
                                            if group in acc.group_current_psd else pii)
    if bands is not None:  # the pixel's own readout: mean and banded spectrum
        if current:
            acc.pixels.append((i, float(i_bins.mean()), bands.average(pii)))
        else:
            acc.pixels.append((i, float(res.bins[:, 0].mean()), bands.average(pxx[0])))
    mod = prep.model.modulation
    if mod is not None:
        q = spectra.drive_quadratures(res.bins, dt_fine, mod[2])
        qi = (spectra.drive_quadratures(_current_bins(res, dt_fine, a_e, a_h), dt_fine,
                                        mod[2]) if current else None)
        acc.quad.append((i, q, qi))
    batches = np.array([b.mean(axis=0) for b in np.array_split(res.bins, N_BATCHES)])
    acc.traj.append((i, res.integ / duration, res.integ2 / duration, batches,
                     prep.model.counts))
    for s in range(res.samples.shape[1]):
        col = res.samples[:, s]
        lo = int(col.min())
        h = np.bincount(col - lo)
        prev = acc.hist.get(s)
        if prev is None:
            acc.hist[s] = (lo, h)
        else:
            acc.hist[s] = _add_hist(prev, (lo, h))


def _add_hist(a, b):
    lo = min(a[0], b[0])
    hi = max(a[0] + len(a[1]), b[0] + len(b[1]))
    out = np.zeros(hi - lo, dtype=np.int64)
    out[a[0] - lo:a[0] - lo + len(a[1])] += a[1]
    out[b[0] - lo:b[0] - lo + len(b[1])] += b[1]
    return lo, out


def _combine(parts: list[_Acc]) -> _Acc:
    """Combine chunk reductions in chunk order (so sums do not depend on the workers)."""
    out = _Acc()
    for p in parts:
        if p.n == 0:
            continue
        if out.n == 0:
            out = dataclasses.replace(p, traj=list(p.traj), hist=dict(p.hist),
                                      quad=list(p.quad), pixels=list(p.pixels),
                                      group_psd=dict(p.group_psd),
                                      group_current_psd=dict(p.group_current_psd))
            continue
        out.n += p.n
        out.sum_x = out.sum_x + p.sum_x
        out.sum_x2 = out.sum_x2 + p.sum_x2
        out.events = out.events + p.events
        out.psd = out.psd + p.psd
        for mine, theirs in ((out.group_psd, p.group_psd),
                             (out.group_current_psd, p.group_current_psd)):
            for g, val in theirs.items():
                mine[g] = mine[g] + val if g in mine else val
        if p.current_psd is not None:
            out.current_psd = out.current_psd + p.current_psd
        out.traj.extend(p.traj)
        out.quad.extend(p.quad)
        out.charge += p.charge
        out.pixels.extend(p.pixels)
        out.n_events += p.n_events
        for s, h in p.hist.items():
            out.hist[s] = _add_hist(out.hist[s], h)
    return out


def _histogram(hist: dict, n_species: int):
    """Common count axis and probabilities per species.

    Species are taken in order (electrons, holes, traps) while the union of their observed
    ranges stays within :data:`MAX_HISTOGRAM_SPAN` values; a species whose range would make
    the axis too wide (e.g. 1e5 majority holes beside 10 electrons) gets a NaN row.
    """
    if not hist:
        return None
    lo = hi = None
    kept = []
    for s in range(n_species):
        start, counts = hist[s]
        new_lo = start if lo is None else min(lo, start)
        new_hi = start + len(counts) if hi is None else max(hi, start + len(counts))
        if new_hi - new_lo <= MAX_HISTOGRAM_SPAN:
            lo, hi = new_lo, new_hi
            kept.append(s)
    if not kept:
        return None
    probs = np.full((n_species, hi - lo), np.nan)
    for s in kept:
        start, counts = hist[s]
        probs[s] = 0.0
        probs[s, start - lo:start - lo + len(counts)] = counts / counts.sum()
    return np.arange(lo, hi, dtype=np.int64), probs


def _response_vars(acc: _Acc, model: Model, current: bool) -> dict:
    """Response at the drive frequency (Monte Carlo lock-in beside the continuum transfer
    function)."""
    channel, kind, freq, depth, _ = model.modulation
    acc.quad.sort(key=lambda row: row[0])
    amp, amp_err, ph, ph_err = spectra.response_from_quadratures(
        np.array([row[1] for row in acc.quad]))
    c_amp, c_ph = continuum.drive_response(model, channel=channel, kind=kind,
                                           frequency_Hz=freq, depth=depth)
    out = {
        "response_amplitude": (("species",), amp),
        "response_amplitude_stderr": (("species",), amp_err),
        "response_phase": (("species",), ph),
        "response_phase_stderr": (("species",), ph_err),
        "response_amplitude_continuum": (("species",), c_amp),
        "response_phase_continuum": (("species",), c_ph),
    }
    if current:
        i_amp, i_err, i_ph, i_ph_err = spectra.response_from_quadratures(
            np.array([row[2] for row in acc.quad]))
        # linearised: the current's continuum response is its gradient on the count response
        # (the modulated optical channel itself moves no carrier across the boundary)
        resp = c_amp * np.exp(1j * c_ph)
        i_c = current_gradient(model, continuum.steady_state(model)) @ resp
        out.update({
            "current_response_amplitude": ((), float(i_amp)),
            "current_response_amplitude_stderr": ((), float(i_err)),
            "current_response_phase": ((), float(i_ph)),
            "current_response_phase_stderr": ((), float(i_ph_err)),
            "current_response_amplitude_continuum": ((), float(abs(i_c))),
            "current_response_phase_continuum": ((), float(np.angle(i_c))),
        })
    return out


def _population_vars(acc: _Acc, bands, scenario: Scenario, readout, cache: _ModelCache
                     ) -> tuple[dict, dict]:
    """Per-pixel mean readout and noise, the fraction above the threshold, worst pixels."""
    pop, current = scenario.population, readout is not None
    acc.pixels.sort(key=lambda row: row[0])
    means = np.array([row[1] for row in acc.pixels])
    spectra_ = np.array([row[2] for row in acc.pixels])
    freqs = np.asarray(pop.frequencies_Hz, dtype=float)
    noise = bands.at(spectra_, freqs)
    kind = "current" if current else "count"
    data = {
        f"pixel_{kind}_mean": (("realization",), means),
        f"pixel_{kind}_noise": (("realization", "noise_frequency"), noise),
        f"pixel_{kind}_spectrum": (("realization", "pixel_frequency"), spectra_),
        "worst_pixel": (("worst",), population.worst_pixels(noise[:, 0])),
    }
    # telegraph-like pixels: one single trap adds more than half of the readout noise
    shares: dict = {}
    share = np.empty_like(noise)
    for row, pix in enumerate(acc.traj):
        counts = pix[4]
        if counts not in shares:  # one linear-noise analysis per distinct device
            shares[counts] = population.single_trap_share(cache.get(counts).model, freqs,
                                                          readout=readout)
        share[row] = shares[counts]
    telegraph = share > 0.5
    data["single_trap_share"] = (("realization", "noise_frequency"), share)
    data["telegraph_fraction"] = (("noise_frequency",), telegraph.mean(axis=0))
    data["telegraph_fraction_stderr"] = (("noise_frequency",), np.sqrt(
        telegraph.mean(axis=0) * (1 - telegraph.mean(axis=0)) / len(telegraph)))
    if pop.threshold is not None:
        frac, err = population.threshold_fraction(noise, pop.threshold)
        data["fraction_above_threshold"] = (("noise_frequency",), frac)
        data["fraction_above_threshold_stderr"] = (("noise_frequency",), err)
    coords = {"noise_frequency": ("noise_frequency", freqs),
              "pixel_frequency": ("pixel_frequency", bands.centres)}
    return data, coords


def _jackknife_groups(n_traj: int) -> int | None:
    """Number of equal groups of trajectories for jackknife fit errors: the largest divisor
    of ``n_traj`` from 8 to 16 (16 groups gave well-calibrated corner errors on telegraph
    signals), or None when there is none."""
    for g in range(16, 7, -1):
        if n_traj % g == 0:
            return g
    return None


def _groups(group_sums: dict, size: int) -> np.ndarray | None:
    """Mean periodograms of the jackknife groups (disjoint, equally many trajectories), or
    None without groups."""
    if len(group_sums) < 8:
        return None
    return np.array([group_sums[g] / size for g in sorted(group_sums)])


def _fit_vars(fits, *, prefix: str, species_dim: bool) -> dict:
    """Lorentzian components (up to two, ascending corner) as data variables; NaN where a
    component was not resolved."""
    n_comp = 2
    shape = (len(fits), n_comp)
    vals = {k: np.full(shape, np.nan) for k in ("S0", "S0_err", "f_c", "f_c_err", "tau",
                                                 "tau_err")}
    for i, fit in enumerate(fits):
        for j, comp in enumerate(fit.components[:n_comp]):
            for k in vals:
                vals[k][i, j] = getattr(comp, k)
    kinds = np.array([f.kind for f in fits], dtype=object)
    dims = ("species", "component") if species_dim else ("component",)

    def pick(a):
        return a if species_dim else a[0]

    return {
        f"{prefix}plateau": (dims, pick(vals["S0"])),
        f"{prefix}plateau_stderr": (dims, pick(vals["S0_err"])),
        f"{prefix}corner_frequency": (dims, pick(vals["f_c"])),
        f"{prefix}corner_frequency_stderr": (dims, pick(vals["f_c_err"])),
        f"{prefix}tau_spectrum": (dims, pick(vals["tau"])),
        f"{prefix}tau_spectrum_stderr": (dims, pick(vals["tau_err"])),
        f"{prefix}spectrum_kind": (dims[:-1], kinds if species_dim else kinds[0]),
    }
