"""``grmc check``: what a scenario means before anything is simulated.

Derived counts, the continuum steady state, linear-noise variances, time scales and the
expected cost of a run, with warnings where the continuum answer cannot be trusted (mean
counts below about 10) or where a run would be too long (more than about 1e10 events).
"""

from __future__ import annotations

import math

import numpy as np

from . import continuum, spread
from .cost import WARN_EVENTS, cost_warnings, estimate
from .model import build_model, nominal_counts, trap_means
from .next_order import next_order
from .scenario import Scenario, check_counts

__all__ = ["summarize", "format_summary", "FEW_CARRIERS", "TOO_MANY_EVENTS"]

#: Below this mean count a continuum answer is not to be trusted (common practice).
FEW_CARRIERS = 10.0
#: Above this many events a run is too long to be practical on one machine.
TOO_MANY_EVENTS = WARN_EVENTS
#: Above this relative size the next-order correction of a mean is worth a warning.
LARGE_CORRECTION = 0.10
#: Rounding a density to a count may move it by this fraction before we warn.
ROUNDING_TOLERANCE = 0.05


def summarize(scenario: Scenario) -> dict:
    """Everything ``grmc check`` reports, as a JSON-ready dict.

    Returns
    -------
    dict with keys ``title``, ``volume_cm3``, ``species``, ``counts``, ``channels``,
    ``steady_continuum`` and ``var_lna`` (by species [count], [count^2]),
    ``relaxation_times_s``, ``event_rate_per_trajectory_s`` [1/s], ``expected_events``,
    ``warnings`` (list of str).
    """
    check_counts(scenario)
    model = build_model(scenario)
    counts = nominal_counts(scenario)
    warnings: list[str] = []
    vol = scenario.volume.volume_cm3
    mat = scenario.material

    def rounding(name: str, mean: float, got: int) -> None:
        if mean > 0 and abs(got - mean) > ROUNDING_TOLERANCE * mean:
            warnings.append(
                f"{name}: density * volume = {mean:.4g} rounds to {got} "
                f"({100 * (got - mean) / mean:+.0f} %)"
            )

    rounding("donors", mat.donors_cm3 * vol, counts.donors)
    rounding("acceptors", mat.acceptors_cm3 * vol, counts.acceptors)
    for trap, mean, got in zip(scenario.traps, trap_means(scenario), counts.traps):
        if trap.count is None:
            rounding(f"trap level '{trap.label}'", mean, got)

    if mat.record is not None:
        warnings.extend(f"[material] {w}" for w in mat.record.warnings)
    ss_model = continuum.steady_state(model)
    lna = continuum.lna(model)
    x0_model = model.nearest_neutral_state(ss_model)
    # the file's species: a spread level's total beside its sub-levels
    ss, var = model.project(ss_model), np.diag(model.project_matrix(lna.covariance))
    x0 = np.rint(model.project(x0_model)).astype(np.int64)
    band = spread.spread_band(model, ss_model)
    rate = float(model.propensities(x0_model).sum())
    run = scenario.run
    events = rate * (run.settle_s + run.duration_s) * run.trajectories
    for name, mean in zip(model.output_species, ss):
        if name.startswith("trapped:"):
            continue
        if mean < FEW_CARRIERS:
            warnings.append(
                f"{name}: continuum mean count {mean:.3g} is below {FEW_CARRIERS:g}; the "
                "continuum and linear-noise answers are not to be trusted here"
            )
    warnings.extend(cost_warnings(estimate(scenario, model, rate)))
    correction = model.project(next_order(model).delta)
    warnings.extend(_correction_warnings(model.output_species, ss, correction))
    times = [float(t) for t in lna.relaxation_times]
    if times and run.duration_s < 20.0 * max(times):
        warnings.append(
            f"duration_s = {run.duration_s:.3g} s is shorter than 20 x the slowest relaxation "
            f"time ({max(times):.3g} s): low-frequency spectra will be poorly resolved"
        )
    fs = run.samples / run.duration_s
    if times and min(times) < 2.0 / fs:
        warnings.append(
            f"the fastest relaxation time ({min(times):.3g} s) is shorter than two sample "
            f"intervals ({2 / fs:.3g} s): raise samples to resolve it"
        )
    return {
        "title": scenario.title,
        "volume_cm3": vol,
        "surface_area_cm2": scenario.volume.surface_area_cm2,
        "material_name": _material_name(scenario),
        "material": _material(scenario),
        "trap_energy_eV": {t.label: t.energy_eV for t in scenario.traps},
        "species": list(model.output_species),
        "counts": {
            "donors": counts.donors,
            "acceptors": counts.acceptors,
            **{f"T_{t.label}": n for t, n in zip(scenario.traps, counts.traps)},
        },
        "conserved_charge": model.charge,
        "channels": [c.name for c in model.channels],
        "steady_continuum": {s: float(v) for s, v in zip(model.output_species, ss)},
        "var_lna": {s: float(v) for s, v in zip(model.output_species, var)},
        "mean_next_order": {s: float(v) for s, v in zip(model.output_species, correction)},
        "steady_density_cm3": {s: float(v) / vol for s, v in zip(model.output_species, ss)},
        "start_state": {s: int(v) for s, v in zip(model.output_species, x0)},
        "flicker_band_Hz": None if band is None else list(band),
        "relaxation_times_s": times,
        "event_rate_per_trajectory_s": rate,
        "expected_events": events,
        "readout_current_A": _current(model),
        "reservoir": None if scenario.reservoir is None else {
            "carrier": scenario.reservoir.carrier,
            "density_cm3": scenario.reservoir.density_cm3,
            "exchange_time_s": scenario.reservoir.exchange_time(scenario.readout),
        },
        "warnings": warnings,
    }


def _material_name(scenario: Scenario) -> str | None:
    """``"HgCdTe (x = 0.3) at 77 K"``, None without a library material."""
    mat = scenario.material
    if mat.name is None:
        return None
    comp = "" if mat.composition_x is None else f" (x = {mat.composition_x:g})"
    return f"{mat.name}{comp} at {mat.temperature_K:g} K"


def _material(scenario: Scenario) -> dict:
    """Each resolved material parameter: ``{key: {"value", "units", "from"}}``.

    ``from`` is ``"scenario"`` for a value the scenario gave, else the law and its published
    source (:mod:`grmc.materials`); the mobilities are those the ``[readout]`` uses.
    """
    mat = scenario.material
    out = {} if mat.record is None else mat.record.as_json()
    if scenario.readout is not None:  # what the readout finally uses (its keys win)
        for key in ("electron_mobility_cm2_Vs", "hole_mobility_cm2_Vs"):
            if key in out:
                out[key]["value"] = getattr(scenario.readout, key)
    return out


def _current(model) -> float | None:
    """Continuum mean readout current [A], None without a [readout]."""
    if model.scenario.readout is None:
        return None
    from .readout import lna_current

    return float(lna_current(model, np.array([1.0])).mean)


def _eng(x: float) -> str:
    if math.isnan(x):
        return "-"
    if x == 0 or not math.isfinite(x):
        return f"{x:g}"
    return f"{x:.4g}"


def _correction_warnings(species, ss, correction) -> list[str]:
    """Where the next-order correction exceeds LARGE_CORRECTION of the continuum mean."""
    out = []
    for name, mean, d in zip(species, ss, correction):
        if mean > 0 and abs(d) > LARGE_CORRECTION * mean:
            out.append(
                f"{name}: the next-order correction of the mean ({d:+.3g}) is "
                f"{100 * abs(d) / mean:.0f} % of the continuum mean: the continuum and "
                "linear-noise answers are off by about that much (use grmc exact or grmc run)")
    return out


def _next_order_lines(info: dict) -> list[str]:
    """The next-order correction of each mean beside the continuum mean, with its size."""
    out = ["", f"  {'species':<22}{'continuum':>16}{'next order':>14}{'relative':>12}"
              "   (predicted exact mean - continuum mean, counts)"]
    for s in info["species"]:
        m = info["steady_continuum"][s]
        d = info["mean_next_order"][s]
        rel = f"{100 * d / m:+.3g} %" if m > 0 else "-"
        out.append(f"  {s:<22}{_eng(m):>16}{_eng(d):>14}{rel:>12}")
    return out


def _material_lines(material: dict, name: str | None) -> list[str]:
    """One line per resolved material value with its units and source."""
    if not material:
        return []
    lines = ["", f"  material {name or '(values from the scenario)'}",
             "  parameter                           value  units         from"]
    for key, v in material.items():
        lines.append(f"  {key:<31}{_eng(v['value']):>11}  {v['units']:<13} {v['from']}")
    return lines


def format_summary(info: dict) -> str:
    """A human-readable table of :func:`summarize`'s result."""
    lines = [f"{info['title']}", f"  volume            {_eng(info['volume_cm3'])} cm^3"]
    c = info["counts"]
    lines.append(f"  donors            {c['donors']}")
    lines.append(f"  acceptors         {c['acceptors']}")
    for k, v in c.items():
        if k.startswith("T_"):
            energy = info.get("trap_energy_eV", {}).get(k[2:])
            where = "" if energy is None else f"  (E_t - E_i = {energy:+.4g} eV)"
            lines.append(f"  traps {k[2:]:<11} {v}{where}")
    lines.append(f"  conserved charge  {info['conserved_charge']}  (N_e - N_h + sum M_k)")
    lines.extend(_material_lines(info.get("material") or {}, info.get("material_name")))
    res = info.get("reservoir")
    if res:
        lines.append(f"  reservoir         {res['carrier']} at {_eng(res['density_cm3'])} cm^-3, "
                     f"exchange time {_eng(res['exchange_time_s'])} s (pairs: the contact "
                     "keeps the volume neutral)")
    lines.append("")
    lines.append(f"  {'species':<22}{'steady (count)':>16}{'density (cm^-3)':>18}"
                 f"{'var LNA':>14}{'Fano':>8}{'start':>10}")
    for s in info["species"]:
        m = info["steady_continuum"][s]
        v = info["var_lna"][s]
        fano = f"{v / m:.3f}" if m > 0 and math.isfinite(v / m) else "-"
        lines.append(f"  {s:<22}{_eng(m):>16}{_eng(info['steady_density_cm3'][s]):>18}"
                     f"{_eng(v):>14}{fano:>8}{info['start_state'][s]:>10}")
    lines.extend(_next_order_lines(info))
    lines.append("")
    if info.get("flicker_band_Hz"):
        lo, hi = info["flicker_band_Hz"]
        lines.append(f"  1/f band of the spread      {_eng(lo)} - {_eng(hi)} Hz")
    if info["relaxation_times_s"]:
        times = ", ".join(_eng(t) for t in info["relaxation_times_s"])
        lines.append(f"  relaxation times (LNA)      {times} s")
    lines.append(f"  event rate per trajectory   {_eng(info['event_rate_per_trajectory_s'])} /s")
    lines.append(f"  expected events of the run  {_eng(info['expected_events'])}")
    if info.get("readout_current_A") is not None:
        lines.append(f"  readout current (continuum) {_eng(info['readout_current_A'])} A")
    lines.append(f"  channels                    {', '.join(info['channels'])}")
    for w in info["warnings"]:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
