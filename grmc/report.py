"""Printed summaries of an output Dataset (the table ``grmc run`` prints)."""

from __future__ import annotations

import math

import numpy as np

from .model import ELEMENTARY_CHARGE_C

__all__ = ["format_run_table", "FLAG_SIGMAS"]

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


def format_run_table(ds) -> str:
    """Per species: Monte Carlo mean ± standard error against the continuum, variance
    against the linear-noise value, and a flag (``!``) where they differ by more than
    :data:`FLAG_SIGMAS` standard errors; then the spectral time constants and the current.

    Parameters
    ----------
    ds : xarray.Dataset  Output of :func:`grmc.simulate.run`

    Returns
    -------
    str
    """
    n = int(ds.attrs.get("trajectories", 0))
    lines = [f"{ds.attrs.get('title', '')}  ({n} trajectories, seed {ds.attrs.get('seed')})"]
    head = (f"  {'species':<20}{'MC mean':>12}{'± s.e.':>10}{'continuum':>12}{'':>9}"
            f"{'MC var':>12}{'± s.e.':>10}{'LNA var':>12}{'':>9}")
    lines.append(head)
    for i, s in enumerate(ds["species"].values):
        m = float(ds["stationary_mean"][i])
        me = float(ds["stationary_mean_stderr"][i])
        c = float(ds["steady_continuum"][i])
        v = float(ds["stationary_var"][i])
        ve = float(ds["stationary_var_stderr"][i]) if "stationary_var_stderr" in ds else np.nan
        lv = float(ds["var_lna"][i])
        lines.append(
            f"  {str(s):<20}{_g(m, 6):>12}{_g(me, 2):>10}{_g(c, 6):>12}{_flag(m, c, me):>9}"
            f"{_g(v, 5):>12}{_g(ve, 2):>10}{_g(lv, 5):>12}{_flag(v, lv, ve):>9}"
        )
    lines.append(f"  ('!': differs by more than {FLAG_SIGMAS:g} standard errors; in a small "
                 "volume the continuum answer is expected to be off)")
    if int(ds.attrs.get("excess_pairs", 0)) > 0:
        lines.append("  note: the window starts with a pulse of excess pairs, so the time averages "
                     "above include the decay and are not stationary values; see the transient "
                     "(count_mean against count_continuum)")
    if "tau_spectrum" in ds:
        lines.append("  time constants from the spectra, tau = 1/(2 pi f_c):")
        for i, s in enumerate(ds["species"].values):
            lines.append(f"    {str(s):<20}{_fit_text(ds, 'tau_spectrum', 'spectrum_kind', i)}")
    if "relaxation_time_lna" in ds and ds["relaxation_time_lna"].size:
        times = ", ".join(_g(t, 3) for t in ds["relaxation_time_lna"].values)
        lines.append(f"  linear-noise relaxation times:      {times} s")
    if "response_amplitude" in ds:
        lines.append("  response at the drive frequency (amplitude, phase vs sin(2 pi f t)):")
        for i, s in enumerate(ds["species"].values):
            a, ae = float(ds["response_amplitude"][i]), float(ds["response_amplitude_stderr"][i])
            p, pe = float(ds["response_phase"][i]), float(ds["response_phase_stderr"][i])
            ca, cp = (float(ds["response_amplitude_continuum"][i]),
                      float(ds["response_phase_continuum"][i]))
            lines.append(f"    {str(s):<20}{_g(a, 4)} ± {_g(ae, 2)} (continuum {_g(ca, 4)}), "
                         f"{_g(p, 3)} ± {_g(pe, 2)} rad (continuum {_g(cp, 3)})")
        if "current_response_amplitude" in ds:
            lines.append(
                f"    {'current':<20}{_g(float(ds['current_response_amplitude']), 4)} ± "
                f"{_g(float(ds['current_response_amplitude_stderr']), 2)} A (continuum "
                f"{_g(float(ds['current_response_amplitude_continuum']), 4)}), "
                f"{_g(float(ds['current_response_phase']), 3)} ± "
                f"{_g(float(ds['current_response_phase_stderr']), 2)} rad (continuum "
                f"{_g(float(ds['current_response_phase_continuum']), 3)})")
    if "current_mean" in ds:
        i_mean = float(ds["current_mean"])
        cont = (f" (continuum {_g(float(ds['current_mean_continuum']), 5)} A)"
                if "current_mean_continuum" in ds else "")
        lines.append(f"  current: mean {_g(i_mean, 5)} A{cont}")
        if "current_shot_noise" in ds:
            white = float(ds["current_shot_noise"])
            fano = white / (2 * ELEMENTARY_CHARGE_C * abs(i_mean)) if i_mean else math.inf
            lines.append(f"           white (shot) level {_g(white, 3)} A^2/Hz, "
                         f"{_g(fano, 3)} x 2q|I|" + (" (crossings both ways)"
                                                    if fano > 1.02 else ""))
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
    if "events_total" in ds.attrs and ds.attrs.get("wall_time_s", 0) > 0:
        ev = int(ds.attrs["events_total"])
        wall = float(ds.attrs["wall_time_s"])
        lines.append(f"  {ev:.3g} events in {wall:.2f} s ({ev / wall / 1e6:.1f} M events/s)")
    return "\n".join(lines)
