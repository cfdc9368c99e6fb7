"""Printed summaries of an output file: the tables ``grmc run`` and ``grmc exact`` print and
the line ``grmc sweep`` prints per point.  Everything is read through
:class:`grmc.result.Result`."""

from __future__ import annotations

import math

import numpy as np

from .model import ELEMENTARY_CHARGE_C
from .result import PowerLaw, Result, from_dataset, is_sublevel

__all__ = ["format_run_table", "format_exact_table", "format_solve_table", "format_sweep_point",
           "FLAG_SIGMAS"]

#: A Monte Carlo value is flagged when it differs from the continuum or linear-noise value by
#: more than this many standard errors (two-sided p ~ 0.003 for a normal estimator).
FLAG_SIGMAS = 3.0


def _g(x: float, digits: int = 4) -> str:
    x = float(x)
    if not math.isfinite(x):
        return "-"
    return f"{x:.{digits}g}"


def _flag(value: float, reference: float, stderr: float) -> str:
    if not (math.isfinite(value) and math.isfinite(reference)):
        return ""
    if math.isfinite(stderr) and stderr > 0:
        z = (value - reference) / stderr
        return f"{z:+.1f}σ" + (" !" if abs(z) > FLAG_SIGMAS else "")
    if stderr == 0 and value != reference:  # no fluctuation at all, yet a different value
        return "!"
    return ""  # no standard error to judge by (e.g. one trajectory)


def _fit_text(ds, name: str, kind_name: str, i: int) -> str:
    kind = str(ds[kind_name].values[i])
    if kind == "unresolved":
        return "no corner resolved"
    parts = []
    for j in range(ds[name].shape[1]):
        tau = float(ds[name][i, j])
        err = float(ds[name + "_stderr"][i, j])
        if math.isfinite(tau):
            parts.append(f"{_g(tau, 4)} ± {_g(err, 2)} s")
    return ("two Lorentzians: " if kind == "two" else "") + ", ".join(parts)


def _band_text(ds) -> str:
    """The rms noise current over the readout band, its interval and the linear-noise value."""
    band = ds["current_noise_rms"].attrs.get("band_Hz")
    where = (f"{_g(band[0], 3)} .. {_g(band[1], 3)} Hz" if band is not None
             and len(band) == 2 else "the readout band")
    rms = float(ds["current_noise_rms"])
    text = f"rms noise over {where}: "
    if not math.isfinite(rms):
        text += "not resolved by the run (band outside the simulated frequencies)"
    else:
        text += f"{_g(rms, 4)} A"
        if "current_noise_rms_low" in ds:
            text += (f" (95 %: {_g(float(ds['current_noise_rms_low']), 3)} .. "
                     f"{_g(float(ds['current_noise_rms_high']), 3)} A)")
    if "current_noise_rms_lna" in ds:
        text += f", linear noise {_g(float(ds['current_noise_rms_lna']), 4)} A"
    return text


def _as_result(ds) -> Result:
    return ds if isinstance(ds, Result) else from_dataset(ds)


def _species_rows(res: Result, first: str) -> list[str]:
    """Mean against the continuum and variance against the linear-noise value, flagged."""
    ds = res.ds
    lines = [f"  {'species':<20}{first + ' mean':>12}{'± s.e.':>10}{'continuum':>12}{'':>9}"
             f"{first + ' var':>12}{'± s.e.':>10}{'LNA var':>12}{'':>9}"]
    fallback = np.full(len(res.species), np.nan)  # an exact value has no statistical error
    me_all = res.values("stationary_mean_stderr") if res.has("stationary_mean_stderr") \
        else fallback
    ve_all = res.values("stationary_var_stderr") if res.has("stationary_var_stderr") \
        else fallback
    mark = _relative if res.exact else _flag
    for i, s in enumerate(res.species):
        if is_sublevel(s):  # a spread level's total stands for its sub-levels
            continue
        m, me = float(ds["stationary_mean"][i]), float(me_all[i])
        c = float(ds["steady_continuum"][i])
        v, ve = float(ds["stationary_var"][i]), float(ve_all[i])
        lv = float(ds["var_lna"][i])
        lines.append(
            f"  {s:<20}{_g(m, 6):>12}{_g(me, 2):>10}{_g(c, 6):>12}{mark(m, c, me):>9}"
            f"{_g(v, 5):>12}{_g(ve, 2):>10}{_g(lv, 5):>12}{mark(v, lv, ve):>9}")
    return lines


def _pixel_rows(res: Result) -> list[str]:
    """A pixel population: each pixel against its own continuum mean and linear-noise
    variance, the differences averaged over the pixels with their standard error."""
    lines = [f"  {'species':<20}{'MC mean':>12}{'± s.e.':>10}{'continuum':>12}{'':>9}"
             f"{'MC var':>12}{'± s.e.':>10}{'LNA var':>12}{'':>9}"]
    n = res.ds.sizes["realization"]
    for s in res.levels:
        cols = []
        for own, theory in (("trajectory_mean", "pixel_steady_continuum"),
                            ("pixel_var", "pixel_var_lna")):
            x, ref = res.values(own, s), res.values(theory, s)
            d = x - ref
            se = float(np.std(d, ddof=1) / np.sqrt(n)) if n > 1 else math.nan
            m, r = float(np.mean(x)), float(np.mean(ref))
            # the flag judges the mean difference by its own standard error
            cols.append(f"{_g(m, 6):>12}{_g(se, 2):>10}{_g(r, 6):>12}"
                        f"{_flag(m - r, 0.0, se):>9}")
        lines.append(f"  {s:<20}" + "".join(cols))
    lines.append(f"  (a population: each of the {n} pixels against its own continuum mean and "
                 "linear-noise variance, averaged over the pixels; ± the standard error of the "
                 "mean difference)")
    return lines


def _relative(value: float, reference: float, stderr: float = 0.0) -> str:
    """Relative difference of an exact value from the theory's, in per cent."""
    return _pct(_ratio(value, reference))


def _spectral_lines(res: Result) -> list[str]:
    ds, lines = res.ds, []
    if "tau_spectrum" in ds:
        lines.append("  time constants from the spectra, tau = 1/(2 pi f_c):")
        for i, s in enumerate(res.species):
            if not is_sublevel(s):
                lines.append(f"    {s:<20}{_fit_text(ds, 'tau_spectrum', 'spectrum_kind', i)}")
    if "relaxation_time_lna" in ds and ds["relaxation_time_lna"].size:
        times = ", ".join(_g(t, 3) for t in ds["relaxation_time_lna"].values)
        lines.append(f"  linear-noise relaxation times:      {times} s")
    return lines


def _response_lines(res: Result) -> list[str]:
    ds = res.ds
    if "response_amplitude" not in ds:
        return []
    lines = ["  response at the drive frequency (amplitude, phase vs sin(2 pi f t)):"]
    rows = [(s, "", i) for i, s in enumerate(res.species) if not is_sublevel(s)]
    if "current_response_amplitude" in ds:
        rows.append(("current", " A", None))
    for name, unit, i in rows:
        pre = "current_" if i is None else ""

        def v(key):
            da = ds[pre + key]
            return float(da if i is None else da[i])
        lines.append(
            f"    {name:<20}{_g(v('response_amplitude'), 4)} ± "
            f"{_g(v('response_amplitude_stderr'), 2)}{unit} (continuum "
            f"{_g(v('response_amplitude_continuum'), 4)}), {_g(v('response_phase'), 3)} ± "
            f"{_g(v('response_phase_stderr'), 2)} rad (continuum "
            f"{_g(v('response_phase_continuum'), 3)})")
    return lines


def _flicker_line(fit: PowerLaw) -> str:
    if not fit.ok:
        return f"    {fit.quantity:<20}no fit"
    corner = (f", meets the flat level at {_g(fit.corner_Hz, 3)} Hz"
              if math.isfinite(fit.corner_Hz) else "")
    return (f"    {fit.quantity:<20}alpha {_g(fit.alpha, 4)} ± {_g(fit.alpha_err, 2)}, "
            f"K {_g(fit.K, 4)} ± {_g(fit.K_err, 2)} {fit.units}{corner}")


def _flicker_lines(res: Result) -> list[str]:
    """The 1/f fit S = K / f^alpha per species (sub-levels left out) and for the current."""
    fits = [res.flicker(s) for s in (*res.levels, "current")]
    fits = [f for f in fits if f is not None]
    if not fits:
        return []
    band = fits[0].band
    where = f" over {_g(band[0], 3)} - {_g(band[1], 3)} Hz" if band is not None else ""
    return ([f"  1/f fit S = K / f^alpha{where} (K: S at 1 Hz):"]
            + [_flicker_line(f) for f in fits])


def _current_lines(res: Result) -> list[str]:
    ds = res.ds
    i_mean = res.scalar("current_mean")
    if i_mean is None:
        return []
    cont = res.scalar("current_mean_continuum")
    lines = [f"  current: mean {_g(i_mean, 5)} A"
             + (f" (continuum {_g(cont, 5)} A)" if cont is not None else "")]
    white = res.scalar("current_shot_noise")
    if white is not None:
        fano = white / (2 * ELEMENTARY_CHARGE_C * abs(i_mean)) if i_mean else math.inf
        lines.append(f"           white (shot) level {_g(white, 3)} A^2/Hz, {_g(fano, 3)} x "
                     "2q|I|" + (" (crossings both ways)" if fano > 1.02 else ""))
    if "current_plateau" in ds:
        for j in range(ds["current_plateau"].size):
            s0 = float(ds["current_plateau"][j])
            if not math.isfinite(s0):
                continue
            fc = float(ds["current_corner_frequency"][j])
            fce = float(ds["current_corner_frequency_stderr"][j])
            lines.append(f"           noise plateau {_g(s0, 3)} A^2/Hz = "
                         f"{_g(math.sqrt(s0), 3)} A/sqrt(Hz), corner {_g(fc, 3)} "
                         f"± {_g(fce, 2)} Hz")
        if str(ds["current_spectrum_kind"].values) == "unresolved":
            lines.append("           no corner resolved in the current spectrum")
    if "current_noise_rms" in ds:
        lines.append("           " + _band_text(ds))
    return lines


def _population_lines(res: Result) -> list[str]:
    ds, lines = res.ds, []
    for kind, unit in (("current", "A"), ("count", "counts")):
        if f"pixel_{kind}_noise" not in ds:
            continue
        means = ds[f"pixel_{kind}_mean"].values
        lines.append(f"  population of {means.size} pixels: mean readout {_g(means.mean(), 4)} "
                     f"{unit}, spread (std) {_g(means.std(ddof=1), 3)} {unit}")
        for j, f in enumerate(ds["noise_frequency"].values):
            noise = ds[f"pixel_{kind}_noise"].values[:, j]
            text = (f"    at {_g(f, 3)} Hz: median noise {_g(np.median(noise), 3)} {unit}^2/Hz, "
                    f"90th percentile {_g(np.percentile(noise, 90), 3)}")
            if "fraction_above_threshold" in ds:
                text += (f"; above threshold {100 * float(ds['fraction_above_threshold'][j]):.1f}"
                         f" ± {100 * float(ds['fraction_above_threshold_stderr'][j]):.1f} %")
            text += (f"; telegraph-like {100 * float(ds['telegraph_fraction'][j]):.1f} ± "
                     f"{100 * float(ds['telegraph_fraction_stderr'][j]):.1f} %")
            lines.append(text)
    return lines


def _accuracy_lines(res: Result) -> list[str]:
    """The accuracy reached by an adaptive run against its target."""
    ds = res.ds
    if "accuracy_target" not in ds.attrs:
        return []
    f1, f2 = (float(f) for f in ds.attrs["accuracy_band_Hz"])
    return [f"  accuracy: +-{100 * float(ds.attrs['accuracy_reached']):.3g} % reached "
            f"(target +-{100 * float(ds.attrs['accuracy_target']):g} %, "
            f"{f1:.3g}-{f2:.3g} Hz) after {int(ds.attrs['rounds'])} rounds; worst: "
            f"{ds.attrs.get('accuracy_worst', '?')}"]


#: What the speed line's wall time holds unless told otherwise: the kernels are compiled (or
#: loaded from the cache) on their first call, inside the timed part of a run.
TIMING_NOTE = "including loading or compiling the kernels on first use"


def _speed_line(res: Result, note: str = TIMING_NOTE) -> list[str]:
    attrs = res.ds.attrs
    if "events_total" not in attrs or not attrs.get("wall_time_s", 0) > 0:
        return []
    ev, wall = int(attrs["events_total"]), float(attrs["wall_time_s"])
    return [f"  {ev:.3g} events in {wall:.2f} s ({ev / wall / 1e6:.1f} M events/s, {note})"]


def format_run_table(ds, *, timing_note: str = TIMING_NOTE) -> str:
    """Per species: Monte Carlo mean ± standard error against the continuum, variance
    against the linear-noise value, and a flag (``!``) where they differ by more than
    :data:`FLAG_SIGMAS` standard errors; then the spectral time constants and the current.

    Parameters
    ----------
    ds : xarray.Dataset or Result  Output of :func:`grmc.simulate.run`
    timing_note : str  What the run's wall time includes (the speed line)

    Returns
    -------
    str
    """
    res = _as_result(ds)
    lines = [f"{res.title}  ({res.trajectories or 0} trajectories, seed {res.seed})"]
    lines += _pixel_rows(res) if res.has("pixel_var") else _species_rows(res, "MC")
    lines.append(f"  ('!': differs by more than {FLAG_SIGMAS:g} standard errors; in a small "
                 "volume the continuum answer is expected to be off)")
    if int(res.ds.attrs.get("excess_pairs", 0)) > 0:
        lines.append("  note: the window starts with a pulse of excess pairs, so the time averages "
                     "above include the decay and are not stationary values; see the transient "
                     "(count_mean against count_continuum)")
    for part in (_spectral_lines, _flicker_lines, _response_lines, _current_lines,
                 _population_lines, _accuracy_lines):
        lines += part(res)
    lines += _speed_line(res, timing_note)
    return "\n".join(lines)


def format_exact_table(ds) -> str:
    """The exact (master-equation) mean and variance of each species beside the continuum
    and linear-noise values, the truncation and the readout current.

    Parameters
    ----------
    ds : xarray.Dataset or Result  Output of :func:`grmc.exact_output.exact_dataset`

    Returns
    -------
    str
    """
    res = _as_result(ds)
    attrs = res.ds.attrs
    outside = res.scalar("probability_outside")
    lines = [f"{res.title}  (exact solution on {int(attrs.get('n_states', 0))} states, "
             f"probability outside the truncation {outside if outside is not None else 0:.2e})"]
    lines += _species_rows(res, "exact")
    lines.append("  (columns after the continuum and LNA values: the exact value's relative "
                 "difference from them; in a small volume the continuum answer is expected to "
                 "be off)")
    lines += _spectral_lines(res) + _current_lines(res)
    return "\n".join(lines)


def _next_order_lines(res: Result) -> list[str]:
    """The predicted next-order correction of each mean beside the continuum mean."""
    ds = res.ds
    if "mean_next_order" not in ds or "steady_continuum" not in ds:
        return []
    parts = []
    for i, name in enumerate(res.species):
        delta, ss = float(ds["mean_next_order"][i]), float(ds["steady_continuum"][i])
        rel = f" ({_pct(delta / ss)})" if ss else ""
        parts.append(f"{name} {_g(delta, 3)}{rel}")
    return ["  next-order correction of the means [counts]: " + ", ".join(parts)]


def format_solve_table(ds) -> str:
    """What ``grmc solve`` prints: the method and its reason, then the table of that
    method (:func:`format_run_table` for Monte Carlo, :func:`format_exact_table` for the
    exact and linear-noise answers) and the next-order correction of the means.

    Parameters
    ----------
    ds : xarray.Dataset or Result  Output of :func:`grmc.solve.solve`

    Returns
    -------
    str
    """
    res = _as_result(ds)
    attrs = res.ds.attrs
    method = str(attrs.get("method", "?"))
    if method == "monte-carlo":
        table = format_run_table(res)
    elif method == "exact":
        table = format_exact_table(res)
    else:
        lines = [f"{res.title}  (linear-noise answer; the means include the next-order "
                 "correction)"]
        lines += _species_rows(res, "LNA")
        lines += _spectral_lines(res) + _current_lines(res)
        table = "\n".join(lines)
    target = attrs.get("accuracy_target")
    head = (f"method: {method} (accuracy target +-{100 * float(target):g} %)" if target
            else f"method: {method}")
    return "\n".join([head, table, *_next_order_lines(res)])


def format_sweep_point(result: dict, varied: dict) -> str:
    """One line per finished sweep point: the varied values, the method, the deviations.

    Parameters
    ----------
    result : dict  A point's result (:func:`grmc.sweep.evaluate_point` keys)
    varied : dict  Swept key -> value of the point

    Returns
    -------
    str
    """
    keys = ", ".join(f"{k}={v:g}" for k, v in varied.items())
    parts = []
    for i, s in enumerate(result["species"]):
        if s.startswith("trapped:"):
            continue
        dm = _ratio(result["mean"][i], result["continuum"][i])
        dv = _ratio(result["var"][i], result["var_lna"][i])
        parts.append(f"{s} mean {_pct(dm)} var {_pct(dv)}")
    return f"point {int(result['index']) + 1}: {keys}  [{result['method']}]  " + "; ".join(parts)


def _ratio(value: float, reference: float) -> float:
    if not (math.isfinite(value) and math.isfinite(reference)) or reference == 0:
        return math.nan
    return value / reference - 1.0


def _pct(x: float) -> str:
    return "-" if not math.isfinite(x) else f"{100 * x:+.1f} %"
