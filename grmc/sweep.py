"""``grmc sweep``: where do continuum answers fail?  Parameter sweeps on Dask.

Each sweep point is one scenario with some keys changed.  It is solved exactly (master
equation) where the state space is small and by Monte Carlo otherwise, chosen per point and
recorded.  Points run as one task each on a dask.distributed cluster (a LocalCluster with
one single-threaded worker per core by default, or an existing scheduler given by its
address); the client gathers results as they complete, saves every finished point at once
(so ``--resume`` loses nothing), and writes the stacked file once at the end.

Point ``i`` is seeded from ``(seed, i)`` only, so results do not depend on where or in which
order points ran.

Where the scenario has a ``[readout]``, each point also holds the readout current's noise at
the chosen frequencies (``--frequency``, default :data:`DEFAULT_NOISE_FREQUENCIES`): exact
or Monte Carlo (``current_psd``), linear noise (``current_psd_lna``) and the part of it the
light's own shot noise drives (``current_psd_photon``, :func:`grmc.readout.photon_current_psd`).
Each point records the intrinsic density and, with a library material, the band gap it used:
a swept ``material.temperature_K`` re-resolves every library value at the point's
temperature, while the keys the scenario gives keep their values.

For each species the sweep file holds the relative deviation of the exact/Monte Carlo mean,
variance and relaxation time from the continuum and linear-noise answers, with uncertainties:

    dev_mean = <N> / N_continuum - 1,   dev_var = var(N) / var_LNA - 1,
    dev_tau  = tau / tau_LNA - 1,

where tau is the integrated correlation time S(0) / (4 var) of each count (for a single
Lorentzian this is its time constant; van Vliet, Proc. IRE 46, 1004, 1958 - from memory).
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import itertools
import json
import logging
import math
import os
import signal
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .atomic import write_text_atomic
from .result import DEVIATION_THRESHOLD, crossing_count
from .scenario import (SCHEMA, Scenario, ScenarioError, check_counts, parse_scenario,
                       set_key)

__all__ = ["Vary", "parse_vary", "round_integers", "parts_dir", "sweep_points", "point_scenario",
           "evaluate_point", "run_sweep", "SchedulerUnreachable", "assemble", "crossing_count",
           "EXACT_STATE_LIMIT"]

#: Seconds to wait for a Dask scheduler given by ``--scheduler`` before giving up.
CONNECT_TIMEOUT_S = 2.0
#: Accuracy the method chooser is given for each point when ``--accuracy`` is not [1].
DEFAULT_ACCURACY = 0.05
#: Largest exact state space a sweep point uses before it falls back to Monte Carlo.
EXACT_STATE_LIMIT = 200_000
#: Frequencies of the readout noise recorded per point unless ``--frequency`` is given [Hz].
DEFAULT_NOISE_FREQUENCIES = (1.0e3,)


@dataclass(frozen=True)
class Vary:
    """One ``--vary KEY=START:STOP:N[:log]``."""

    key: str
    values: tuple[float, ...]
    log: bool = False


def parse_vary(text: str) -> Vary:
    """Parse ``section.key=START:STOP:N[:log]``.

    Raises
    ------
    ValueError  With a message naming what is wrong.
    """
    if "=" not in text:
        raise ValueError(f"{text!r}: expected KEY=START:STOP:N[:log]")
    key, spec = text.split("=", 1)
    key = key.strip()
    _check_key_form(text, key)
    parts = spec.split(":")
    if len(parts) not in (3, 4) or (len(parts) == 4 and parts[3] not in ("log", "lin")):
        raise ValueError(f"{text!r}: expected KEY=START:STOP:N[:log]")
    try:
        start, stop, n = float(parts[0]), float(parts[1]), int(parts[2])
    except ValueError:
        raise ValueError(f"{text!r}: START and STOP must be numbers and N a whole number") \
            from None
    if n < 1:
        raise ValueError(f"{text!r}: N must be >= 1")
    log = len(parts) == 4 and parts[3] == "log"
    if log:
        if start <= 0 or stop <= 0:
            raise ValueError(f"{text!r}: a log range needs START and STOP > 0")
        values = np.geomspace(start, stop, n)
    else:
        values = np.linspace(start, stop, n)
    return Vary(key=key, values=tuple(float(v) for v in values), log=log)


def _check_key_form(text: str, key: str) -> None:
    """Refuse a key without its section, naming the section that holds it."""
    parts = key.split(".")
    if len(parts) == 2 or (len(parts) == 3 and parts[0] == "traps"):
        return
    if len(parts) == 1:
        home = [sec for sec, table in SCHEMA.items() if key in table]
        hint = (f"; write {home[0]}.{key}" if home and home[0] != "traps"
                else f"; write traps.<label>.{key}" if home else "")
        raise ValueError(f"{text!r}: the key {key!r} needs its section, as section.key "
                         f"or traps.<label>.key{hint}")
    raise ValueError(f"{text!r}: expected section.key or traps.<label>.key before '='")


def _spec_of(key: str):
    parts = key.split(".")
    section, name = ("traps", parts[2]) if parts[0] == "traps" and len(parts) == 3 else parts
    return SCHEMA.get(section, {}).get(name)


def round_integers(vary: Vary) -> tuple[Vary, str | None]:
    """Round the values swept into an integer key (counts, samples, seeds).

    Returns
    -------
    (Vary, str or None)  The sweep with the values that will run, and a warning listing the
        values that were rounded (None when none was).
    """
    spec = _spec_of(vary.key)
    if spec is None or spec.kind != "int":
        return vary, None
    rounded = tuple(float(math.floor(v + 0.5)) for v in vary.values)
    changed = [(v, r) for v, r in zip(vary.values, rounded) if v != r]
    if not changed:
        return vary, None
    shown = ", ".join(f"{v:g} -> {r:g}" for v, r in changed[:4]) + (
        ", ..." if len(changed) > 4 else "")
    note = (f"--vary {vary.key}: an integer key; rounded {shown} (the file records the "
            "values that ran)")
    return dataclasses.replace(vary, values=rounded), note


def sweep_points(varies: list[Vary]) -> list[dict[str, float]]:
    """All combinations, the first ``--vary`` varying slowest."""
    return [dict(zip([v.key for v in varies], combo))
            for combo in itertools.product(*[v.values for v in varies])]


def _typed(key: str, value: float) -> Any:
    spec = _spec_of(key)
    if spec is None:
        return value
    if spec.kind == "int":
        return int(round(value))
    if spec.kind == "list3":  # a swept box edge: a cube
        return [float(value)] * 3
    return float(value)


def point_scenario(scenario: Scenario, assignment: dict[str, float]) -> Scenario:
    """The scenario with the keys of one sweep point set (validated again)."""
    data = tomllib.loads(scenario.text)
    desc = ", ".join(f"{k}={v:g}" for k, v in assignment.items())
    src = f"{scenario.source} (--vary {desc})"
    for key, value in assignment.items():
        set_key(data, key, _typed(key, value), source=scenario.source)
    scen = parse_scenario(data, source=src, text=scenario.text)
    check_counts(scen)
    return scen


def _point_seed(seed: int, index: int) -> int:
    ss = np.random.SeedSequence(seed, spawn_key=(index,))
    return int(ss.generate_state(1, np.uint32)[0])


def _lna_tau(model) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """Continuum steady state, linear-noise variance and spectral time constant S(0)/(4 var)
    (at f0, four decades below the slowest corner) from :func:`grmc.theory.theory`."""
    from . import continuum
    from .theory import theory

    th = theory(model)
    var = th.variables["var_lna"][1]
    times = th.variables["relaxation_time_lna"][1]
    f0 = 1e-4 / (2 * math.pi * times.max()) if times.size else 1.0
    smat = model.project_matrix(continuum.lna_psd(model, np.array([f0])))
    s0 = np.real(np.einsum("iif->if", smat))[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        tau = np.where(var > 0, s0 / (4 * var), np.nan)
    return th.steady, var, tau, f0


def evaluate_point(scenario: Scenario, index: int, *, exact_limit: int = EXACT_STATE_LIMIT,
                   noise_frequencies: tuple[float, ...] = DEFAULT_NOISE_FREQUENCIES,
                   accuracy: float = DEFAULT_ACCURACY) -> dict:
    """Solve one sweep point with the method :func:`grmc.solve.choose_method` picks for
    ``accuracy``: exact where the state space fits, linear noise (the continuum mean plus its
    next-order correction, the linear-noise variance and time constant) where its predicted
    error is below accuracy/5 and no count is small, otherwise a Monte Carlo run of the
    scenario's ``[run]`` (also where the exact solver refuses).

    Returns
    -------
    dict of JSON-ready values: ``index``, ``method``, ``method_reason``, ``species``,
    ``mean_next_order`` and per species lists
    ``mean``, ``mean_err``, ``var``, ``var_err``, ``tau``, ``tau_err``, ``continuum``,
    ``var_lna``, ``tau_lna``; ``intrinsic_density`` [cm^-3] and ``band_gap`` [eV] (NaN
    without a library material); with a ``[readout]`` the lists ``current_psd``,
    ``current_psd_lna`` and ``current_psd_photon`` at ``noise_frequencies`` [A^2/Hz].  With
    a ``[population]`` the point is always a Monte Carlo population and the dict also holds
    its per-frequency ``telegraph_fraction`` (with ``_stderr``), ``noise_median`` and
    ``relative_noise_median`` (:func:`_population_of`).  With a spread trap level the
    species are the output species (the level's total beside its sub-levels).
    """
    from . import exact
    from .model import build_model
    from .solve import choose_method

    model = build_model(scenario)
    ss, var_lna, tau_lna, f0 = _lna_tau(model)
    noise_f = np.asarray(noise_frequencies, dtype=float)
    out: dict[str, Any] = {"index": index, "species": list(model.output_species),
                           "mean_next_order": model.project(_next_order_delta(model))}
    if scenario.population is not None:  # a population needs its pixels simulated
        method, reason = "monte-carlo", "a population needs its pixels simulated"
    else:
        method, reason = choose_method(scenario, accuracy, max_states=exact_limit)
    out["method_reason"] = reason
    current = None
    if method == "linear-noise":
        zeros = np.zeros(len(model.output_species))
        out.update(method=method, mean=model.project(ss) + out["mean_next_order"],
                   mean_err=zeros, var=var_lna, var_err=zeros, tau=tau_lna, tau_err=zeros)
    if method == "exact":
        try:
            _exact_point(model, out, f0, noise_f, exact_limit)
            current = out.pop("current")
        except exact.ExactRefusal as exc:  # too stiff after all: Monte Carlo instead
            method = "monte-carlo"
            out["method_reason"] = f"{reason}, but the master equation was refused ({exc})"
    if method == "monte-carlo":
        current = _monte_carlo_point(scenario, index, out, noise_f)
    out.update(continuum=model.project(ss), var_lna=var_lna, tau_lna=tau_lna)
    mat = scenario.material
    gap = None if mat.record is None else mat.record.value("band_gap_eV")
    out.update(intrinsic_density=mat.intrinsic_density_cm3,
               band_gap=float("nan") if gap is None else gap)
    if scenario.readout is not None:
        from .readout import lna_current, photon_current_psd

        lna = lna_current(model, noise_f).psd
        out.update(current_psd=lna if method == "linear-noise" else current, current_psd_lna=lna,
                   current_psd_photon=photon_current_psd(model, noise_f))
    return {k: (np.asarray(v, dtype=float).tolist() if isinstance(v, np.ndarray) else v)
            for k, v in out.items()}


def _population_of(ds) -> dict:
    """A population point's summary per chosen frequency: the fraction of telegraph-like
    pixels with its binomial standard error, the median pixel noise [unit^2/Hz] and the median
    relative noise S / mean^2 (mean: the pixel's mean readout) [Hz^-1]; empty without one."""
    if "telegraph_fraction" not in ds:
        return {}
    kind = "current" if "pixel_current_noise" in ds else "count"
    noise = ds[f"pixel_{kind}_noise"].values
    mean = ds[f"pixel_{kind}_mean"].values
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = noise / mean[:, None] ** 2
    return {"population_kind": kind,
            "noise_frequency": ds["noise_frequency"].values,
            "telegraph_fraction": ds["telegraph_fraction"].values,
            "telegraph_fraction_stderr": ds["telegraph_fraction_stderr"].values,
            "noise_median": np.median(noise, axis=0),
            "relative_noise_median": np.median(rel, axis=0)}


def _monte_carlo_point(scenario: Scenario, index: int, out: dict, noise_f: np.ndarray):
    """The Monte Carlo values of a sweep point (the scenario's fixed ``[run]``), into
    ``out``; returns the readout spectrum at ``noise_f`` or None."""
    from .cost import refuse_absurd, run_cost
    from .simulate import run

    refuse_absurd(scenario, run_cost(scenario))  # a point that could never finish
    seed = _point_seed(scenario.run.seed, index)
    ds = run(scenario, seed=seed, workers=1, progress=False)
    var = ds["stationary_var"].values
    # S(0): the sum of the fitted Lorentzian components' plateaus (NaN if unresolved)
    comps = ds["plateau"].values
    resolved = np.isfinite(comps).any(axis=1)
    plateau = np.where(resolved, np.nansum(comps, axis=1), np.nan)
    plateau_err = np.sqrt(np.nansum(ds["plateau_stderr"].values ** 2, axis=1))
    with np.errstate(divide="ignore", invalid="ignore"):
        tau = plateau / (4 * var)
        tau_err = np.abs(tau) * np.hypot(plateau_err / plateau,
                                         ds["stationary_var_stderr"].values / var)
    out.update(method="monte-carlo", seed=seed, trajectories=int(ds.attrs["trajectories"]),
               mean=ds["stationary_mean"].values, mean_err=ds["stationary_mean_stderr"].values,
               var=var, var_err=ds["stationary_var_stderr"].values, tau=tau, tau_err=tau_err)
    out.update(_population_of(ds))
    if "current_psd" in ds:
        return _log_interp(noise_f, ds["frequency"].values, ds["current_psd"].values)
    return None


def _next_order_delta(model) -> np.ndarray:
    """The predicted next-order correction of each mean (NaN without a steady state)."""
    from .continuum import ContinuumError
    from .next_order import mean_correction

    try:
        return np.asarray(mean_correction(model), dtype=float)
    except ContinuumError:
        return np.full(model.n_species, np.nan)


def _exact_point(model, out: dict, f0: float, noise_f: np.ndarray, limit: int) -> None:
    """The master-equation values of a sweep point, into ``out`` (``current``: the readout
    spectrum at ``noise_f`` or None)."""
    from . import exact

    res = exact.solve(model, freqs=np.concatenate([[f0], noise_f]), max_states=limit)
    current = None
    if model.scenario.readout is not None:
        from .readout import exact_current

        current = exact_current(model, res).psd[1:]
    if model.has_sublevels:  # the output species: a spread level's total beside its parts
        s0 = np.real(np.einsum("iif->if", model.project_matrix(res.psd_matrix[:, :, :1])))
        s0, var = s0[:, 0], np.diag(model.project_matrix(res.covariance))
    else:
        s0, var = res.psd[:, 0], res.var
    with np.errstate(divide="ignore", invalid="ignore"):
        tau = np.where(var > 0, s0 / (4 * var), np.nan)
    zeros = np.zeros(len(model.output_species))
    out.update(method="exact", n_states=int(res.n_states), mean=model.project(res.mean),
               mean_err=zeros, var=var, var_err=zeros, tau=tau, tau_err=zeros,
               probability_outside=float(res.mass_outside), current=current)


def _log_interp(f: np.ndarray, freqs: np.ndarray, psd: np.ndarray) -> np.ndarray:
    """A positive spectrum at ``f``, interpolated in log-log; NaN outside its frequencies."""
    ok = (freqs > 0) & (psd > 0)
    lf, lp = np.log(freqs[ok]), np.log(psd[ok])
    out = np.exp(np.interp(np.log(f), lf, lp))
    return np.where((f >= freqs[ok].min()) & (f <= freqs[ok].max()), out, np.nan)


def _evaluate_task(scenario: Scenario, assignment: dict, index: int,
                   noise_frequencies: tuple[float, ...] = DEFAULT_NOISE_FREQUENCIES,
                   accuracy: float = DEFAULT_ACCURACY) -> dict:
    """One Dask task: build the point's scenario and solve it."""
    res = evaluate_point(point_scenario(scenario, assignment), index,
                         noise_frequencies=noise_frequencies, accuracy=accuracy)
    res["assignment"] = assignment
    return res


def _signature(scenario: Scenario, varies: list[Vary], noise_f: tuple[float, ...],
               accuracy: float = DEFAULT_ACCURACY) -> str:
    text = scenario.text + "\n" + json.dumps([dataclasses.asdict(v) for v in varies])
    if accuracy != DEFAULT_ACCURACY:
        text += f"\naccuracy {accuracy!r}"
    if noise_f != DEFAULT_NOISE_FREQUENCIES:  # (the default keeps older signatures)
        text += "\n" + json.dumps(noise_f)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _atomic_json(path: Path, obj) -> None:
    write_text_atomic(path, json.dumps(obj))


def parts_dir(out: Path) -> Path:
    """The folder beside a sweep file that keeps its finished points until it is written."""
    return out.with_name(out.name + ".parts")


class SchedulerUnreachable(ConnectionError):
    """No Dask scheduler answers at the address given (an environment failure)."""


@contextlib.contextmanager
def _sigint_ignored():
    """Start worker processes with Ctrl-C ignored: an interruption reaches the whole process
    group, and only this process should answer it (the workers are closed from here).  A
    process started with SIGINT ignored keeps it ignored (POSIX exec semantics)."""
    try:
        previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    except ValueError:  # not the main thread
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _connect(scheduler: str | None, workers: int | None, n_tasks: int):
    """A Dask client (and the LocalCluster it owns, or None)."""
    from dask.distributed import Client, LocalCluster

    from .engine.ensemble import default_workers

    if scheduler:
        try:
            return Client(scheduler, timeout=CONNECT_TIMEOUT_S), None
        except (OSError, ValueError, TypeError) as exc:
            raise SchedulerUnreachable(
                f"--scheduler {scheduler}: no Dask scheduler answered within "
                f"{CONNECT_TIMEOUT_S:g} s ({exc})") from None
    n = workers or default_workers()
    # the cluster's own log lines (a cancelled task, a worker killed on closing, a point's
    # refusal) would follow the one line grmc prints: every failure of a point comes back
    # to this process as its exception, so the cluster's logs are kept quiet
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    # workers stopped by Ctrl-C leave their semaphores to multiprocessing's resource tracker,
    # which cleans them up and says so in a warning of its own after grmc's line: it is told
    # (through the environment it inherits) that this is expected
    quiet = "ignore:resource_tracker:UserWarning"
    if quiet not in os.environ.get("PYTHONWARNINGS", ""):
        os.environ["PYTHONWARNINGS"] = ",".join(
            w for w in (os.environ.get("PYTHONWARNINGS"), quiet) if w)
    with _sigint_ignored():
        cluster = LocalCluster(n_workers=min(n, n_tasks), threads_per_worker=1,
                               dashboard_address=None, processes=True,
                               silence_logs=logging.CRITICAL,
                               # the scheduler's small HTTP server on a free local port (its
                               # default, 8787, may be taken by another cluster on the machine)
                               scheduler_kwargs={"dashboard_address": "127.0.0.1:0"})
    return Client(cluster), cluster


def _open_parts(parts: Path, sig: str, n_points: int, resume: bool, out: Path) -> dict:
    """The points an earlier run of the same sweep finished (creating the folder if new)."""
    manifest = parts / "manifest.json"
    done: dict[int, dict] = {}
    if parts.exists():
        old = json.loads(manifest.read_text()) if manifest.exists() else {}
        if not resume:
            raise ScenarioError(str(out), "", "", f"an unfinished sweep is in {parts}; "
                                "add --resume to continue it or delete that folder")
        if old.get("signature") != sig:
            raise ScenarioError(str(out), "", "", f"{parts} belongs to a different sweep "
                                "(scenario or --vary changed); delete it to start afresh")
        for f in sorted(parts.glob("point_*.json")):
            res = json.loads(f.read_text())
            done[int(res["index"])] = res
    else:
        parts.mkdir(parents=True)
        _atomic_json(manifest, {"signature": sig, "points": n_points})
    return done


def _remove_parts(parts: Path) -> None:
    for f in parts.iterdir():  # including temporary files an interruption left behind
        f.unlink()
    parts.rmdir()


def run_sweep(scenario: Scenario, varies: list[Vary], out: str | Path, *,
              scheduler: str | None = None, resume: bool = False, workers: int | None = None,
              command: str | None = None, max_points: int | None = None,
              noise_frequencies: tuple[float, ...] | None = None,
              on_point: Callable[[dict], None] | None = None,
              accuracy: float = DEFAULT_ACCURACY) -> Path | None:
    """Run every sweep point on Dask and write the stacked file.

    Parameters
    ----------
    scenario : Scenario  The base scenario
    varies : list of Vary  The swept keys
    out : path  The sweep file
    scheduler : str, optional  Address of a running Dask scheduler; default a LocalCluster
        (one single-threaded worker per core, no dashboard)
    resume : bool  Keep the points an earlier, interrupted run of the same sweep finished
    workers : int, optional  LocalCluster workers (default: all cores)
    command : str, optional  Command line recorded in ``history``
    max_points : int, optional  Stop after this many new points (leaves the sweep
        unfinished, as an interruption would; used to test ``resume``)
    noise_frequencies : tuple of float, optional  Frequencies of the readout noise recorded
        per point (default :data:`DEFAULT_NOISE_FREQUENCIES`) [Hz]
    on_point : callable, optional  Called with each point's result as it finishes
    accuracy : float  The accuracy the method chooser is given per point [1]

    Returns
    -------
    Path or None  The sweep file; None while points are missing (``max_points``).

    Raises
    ------
    ScenarioError  A swept key or value the scenario format rejects.
    SchedulerUnreachable  No scheduler at ``scheduler`` (nothing is left behind).
    """
    from .dataset import save

    out = Path(out)
    noise_f = tuple(sorted(noise_frequencies or DEFAULT_NOISE_FREQUENCIES))
    points = sweep_points(varies)
    # validate every point before anything runs (bad keys and values exit 2, nothing written)
    for assignment in points:
        point_scenario(scenario, assignment)
    parts = parts_dir(out)
    fresh = not parts.exists()
    done = _open_parts(parts, _signature(scenario, varies, noise_f, accuracy), len(points), resume, out)
    todo = [i for i in range(len(points)) if i not in done]
    if max_points is not None:
        todo = todo[:max_points]
    if todo:
        from dask.distributed import as_completed

        try:
            client, cluster = _connect(scheduler, workers, len(todo))
        except SchedulerUnreachable:
            if fresh:  # nothing was computed: leave nothing behind
                _remove_parts(parts)
            raise
        try:
            futures = [client.submit(_evaluate_task, scenario, points[i], i, noise_f,
                                     accuracy, pure=False) for i in todo]
            for fut in as_completed(futures):
                try:
                    res = fut.result()
                except ScenarioError:  # a point refused: keep only what other points finished
                    if fresh and not done:
                        _remove_parts(parts)
                    raise
                _atomic_json(parts / f"point_{res['index']:05d}.json", res)
                done[int(res["index"])] = res
                if on_point is not None:
                    on_point(res)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    if len(done) < len(points):
        return None
    ds = assemble(scenario, varies, [done[i] for i in range(len(points))], command=command,
                  noise_frequencies=noise_f)
    save(ds, out)
    _remove_parts(parts)
    return out


def assemble(scenario: Scenario, varies: list[Vary], results: list[dict], *,
             command: str | None = None,
             noise_frequencies: tuple[float, ...] = DEFAULT_NOISE_FREQUENCIES):
    """Stack point results along ``sweep`` and add the relative deviations."""
    import xarray as xr

    from .dataset import finish

    species = results[0]["species"]

    def stack(name):
        return np.array([r[name] for r in results], dtype=float)

    data = {}
    for name in ("mean", "mean_err", "var", "var_err", "tau", "tau_err", "continuum",
                 "var_lna", "tau_lna"):
        data[name] = stack(name)
    dev = {
        "mean": _relative(data["mean"], data["mean_err"], data["continuum"]),
        "var": _relative(data["var"], data["var_err"], data["var_lna"]),
        "tau": _relative(data["tau"], data["tau_err"], data["tau_lna"]),
    }
    sw = ("sweep", "species")
    variables = {
        "stationary_mean": (sw, data["mean"]),
        "stationary_mean_stderr": (sw, data["mean_err"]),
        "stationary_var": (sw, data["var"]),
        "stationary_var_stderr": (sw, data["var_err"]),
        "steady_continuum": (sw, data["continuum"]),
        "var_lna": (sw, data["var_lna"]),
        "tau_correlation": (sw, data["tau"]),
        "tau_correlation_stderr": (sw, data["tau_err"]),
        "tau_correlation_lna": (sw, data["tau_lna"]),
        "deviation_mean": (sw, dev["mean"][0]),
        "deviation_mean_stderr": (sw, dev["mean"][1]),
        "deviation_var": (sw, dev["var"][0]),
        "deviation_var_stderr": (sw, dev["var"][1]),
        "deviation_tau": (sw, dev["tau"][0]),
        "deviation_tau_stderr": (sw, dev["tau"][1]),
        "method": (("sweep",), np.array([r["method"] for r in results], dtype=object)),
        "method_reason": (("sweep",), np.array([r.get("method_reason", "")
                                                for r in results], dtype=object)),
    }
    if all("mean_next_order" in r for r in results):
        variables["mean_next_order"] = (sw, stack("mean_next_order"))
    variables["intrinsic_density"] = (("sweep",), stack("intrinsic_density"))
    gaps = stack("band_gap")
    if np.isfinite(gaps).any():  # a library material
        variables["band_gap"] = (("sweep",), gaps)
    coords = {
        "sweep": ("sweep", np.arange(len(results), dtype=np.int64)),
        "species": ("species", np.array(species, dtype=object)),
    }
    if all("telegraph_fraction" in r for r in results):  # a population at every point
        kind = results[0]["population_kind"]
        nf = ("sweep", "noise_frequency")
        variables.update({
            "telegraph_fraction": (nf, stack("telegraph_fraction")),
            "telegraph_fraction_stderr": (nf, stack("telegraph_fraction_stderr")),
            f"pixel_{kind}_noise_median": (nf, stack("noise_median")),
            f"pixel_{kind}_relative_noise_median": (nf, stack("relative_noise_median")),
        })
        coords["noise_frequency"] = ("noise_frequency",
                                     np.asarray(results[0]["noise_frequency"], dtype=float))
    if "current_psd_lna" in results[0]:
        coords["frequency"] = ("frequency", np.asarray(noise_frequencies, dtype=float))
        for name in ("current_psd", "current_psd_lna", "current_psd_photon"):
            values = [np.full(len(noise_frequencies), np.nan) if r[name] is None else r[name]
                      for r in results]
            variables[name] = (("sweep", "frequency"), np.array(values, dtype=float))
    for v in varies:
        coords[v.key] = ("sweep", np.array([r["assignment"][v.key] for r in results]))
    ds = xr.Dataset(variables, coords=coords)
    for v in varies:
        ds[v.key].attrs.update({"long_name": f"swept scenario key {v.key}",
                                "units": _key_units(v.key)})
    ds = finish(ds, title=scenario.title, scenario_toml=scenario.text, command=command,
                kind="sweep", swept_keys=" ".join(v.key for v in varies),
                deviation_threshold=DEVIATION_THRESHOLD, seed=int(scenario.run.seed))
    ds["method"].attrs.update({"long_name": "method chosen for the point: exact, "
                               "linear-noise or monte-carlo", "units": "1"})
    ds["method_reason"].attrs.update({"long_name": "why the method was chosen, with its "
                                      "numbers", "units": "1"})
    return ds


def _relative(value: np.ndarray, err: np.ndarray, reference: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray]:
    """value / reference - 1 and its standard error; 0 where both are exactly 0 (a trap level
    with no traps: nothing fluctuates and every answer agrees)."""
    both_zero = (value == 0) & (reference == 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        dev = np.where(both_zero, 0.0, value / reference - 1)
        dev_err = np.where(both_zero, err, err / reference)
    return dev, dev_err


def _key_units(key: str) -> str:
    """UDUNITS string from the unit suffix of a scenario key."""
    suffixes = {"_cm3": "cm-3", "_cm3_s": "cm3 s-1", "_cm6_s": "cm6 s-1", "_cm2": "cm2",
                "_eV": "eV", "_K": "K", "_s": "s", "_nm": "nm", "_V": "V", "_cm": "cm",
                "_cm_s": "cm s-1", "_cm2_Vs": "cm2 V-1 s-1"}
    name = key.split(".")[-1]
    if name == "volume_cm3":
        return "cm3"
    if name.endswith("density_cm3") or name.endswith("_cm3") and "capture" not in name:
        return "cm-3"
    for suffix, units in sorted(suffixes.items(), key=lambda kv: -len(kv[0])):
        if name.endswith(suffix):
            return units
    return "1"
