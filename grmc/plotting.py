"""Figures of an output file: spectra, transient, count histogram, event rates.

matplotlib is imported inside the functions, never at module import, and only through its
object interface (``matplotlib.figure.Figure``): no pyplot state, no GUI, PNGs through the
Agg renderer.  Every ``plot_*`` function takes ``ax=`` (a new figure when None) and returns
the axes it drew on; to show a figure interactively pass an axes made with pyplot.

Variables used (docs/file-format.md), all optional except where a plot needs them:
``psd``, ``psd_low``, ``psd_high``, ``psd_lna`` (species, frequency); ``current_psd``,
``current_psd_lna`` (frequency), ``current_mean``; ``count_mean``, ``count_var``,
``count_continuum`` (species, t); ``event_rate`` (channel); and these additions:

* ``corner_frequency`` (species, [component]) [Hz] and ``current_corner_frequency``
  ([component]) [Hz]: fitted corners; when absent the corner is fitted here
  (:func:`grmc.spectra.analyse_spectrum`);
* ``count_histogram`` (species, count_value) [1]: time-weighted probability that the count
  equals ``count_value`` (an integer coordinate, 0 .. max), pooled over the ensemble;
* ``count_histogram_exact`` (species, count_value) [1]: the exact stationary law, where
  known (small volumes, ``grmc exact``).

Public API
----------
plot_psd(ds, species_or_current, ax=None) -> Axes
plot_transient(ds, ax=None, *, species=None) -> Axes
plot_histogram(ds, species, ax=None) -> Axes
plot_event_rates(ds, ax=None) -> Axes
plot_all(path_nc, outdir) -> list[Path]
"""

from __future__ import annotations

import math
import os
import textwrap
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from . import spectra
from .atomic import atomic_target
from .result import DEVIATION_THRESHOLD, Result, Spectrum, crossing_count, from_dataset, \
    open_result

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr
    from matplotlib.axes import Axes

__all__ = ["plot_all", "plot_event_rates", "plot_histogram", "plot_psd", "plot_transient",
           "plot_validity", "plot_population", "plot_worst_pixels", "plot_sweep_noise",
           "plot_population_sweep"]

DPI = 150
_PANEL = (6.4, 4.3)  # inches per panel
_MC_COLOR = "C0"
_LNA_COLOR = "0.15"
_CORNER_COLOR = "C3"

_PREFIXES = [(1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"), (1e-12, "p"), (1e-15, "f")]


def _new_axes(ax: Axes | None, size: tuple[float, float] = _PANEL) -> Axes:
    if ax is not None:
        return ax
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    return fig.add_subplot()


def _note(ax: Axes, text: str) -> Axes:
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", wrap=True,
            fontsize=9, color="0.3")
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def _engineering(value: float) -> tuple[float, str]:
    """Scale and SI prefix for a positive magnitude (s, ms, µs, ns, ...)."""
    for scale, prefix in _PREFIXES:
        if abs(value) >= scale:
            return scale, prefix
    return _PREFIXES[-1]


def _si(value: float, unit: str) -> str:
    """'1.23 MHz' style text."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}"
    exp3 = math.floor(math.log10(abs(value)) / 3)
    exp3 = max(-5, min(4, exp3))
    prefix = {-5: "f", -4: "p", -3: "n", -2: "µ", -1: "m", 0: "", 1: "k", 2: "M", 3: "G",
              4: "T"}[exp3]
    return f"{value / 10 ** (3 * exp3):.3g} {prefix}{unit}"


#: Characters of a title line that fit a panel of the default width at the title's size.
TITLE_WIDTH = 60


def _as_result(ds: xr.Dataset | Result) -> Result:
    return ds if isinstance(ds, Result) else from_dataset(ds)


def _title(res: Result, sub: str, ax: Axes | None = None) -> str:
    """The scenario title (with the result's note) shortened to one line that fits the
    panel, then what the panel shows, wrapped."""
    width = TITLE_WIDTH
    if ax is not None:  # scale with the panel's width (the default panel is 6.4 in)
        fig_w = ax.figure.get_figwidth() * ax.get_position().width
        width = max(24, int(TITLE_WIDTH * fig_w / 5.6))
    head = f"{res.title} {res.note}".strip()
    head = textwrap.shorten(head, width, placeholder=" ...") if head else ""
    lines = ([head] if head else []) + textwrap.wrap(sub, width)
    return "\n".join(lines)


def _species_label(name: str) -> str:
    if name.startswith("trapped:"):
        return f"occupied traps ({name.split(':', 1)[1]})"
    return name


def _corners(tab: Spectrum) -> tuple[list[float], str]:
    """Corner frequencies from the file, else fitted here; and a note when there is none."""
    if tab.corners is not None:
        return list(tab.corners), tab.corner_note
    if not tab.has_interval:
        return [], ""
    try:
        res = spectra.analyse_spectrum(tab.frequency, tab.psd, tab.psd_low, tab.psd_high,
                                       tab.n_segments)
    except ValueError as exc:
        return [], str(exc)
    if res.kind == "unresolved":
        return [], res.message
    return list(res.corner_frequencies), ""


# --------------------------------------------------------------------------------------------
def plot_psd(ds: xr.Dataset | Result, species_or_current: str = "current",
             ax: Axes | None = None) -> Axes:
    """Log-log spectrum: Monte Carlo with its 95 % band, linear-noise line, corner(s).

    Parameters
    ----------
    ds : xarray.Dataset or Result  Output file contents
    species_or_current : str  "current" or a species name
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    try:
        tab = res.spectrum(species_or_current)
    except (ValueError, KeyError) as exc:
        return _note(ax, f"no spectrum: {exc}")
    f = tab.frequency
    if tab.has_interval:
        ax.fill_between(f, tab.psd_low, tab.psd_high, color=_MC_COLOR, alpha=0.25, lw=0,
                        label="95 % interval")
    k_txt = f", K = {tab.n_segments:.0f}" if tab.n_segments else ""
    ax.plot(f, tab.psd, color=_MC_COLOR, lw=0.8 if not tab.exact else 1.6,
            label="exact (master equation)" if tab.exact else f"Monte Carlo{k_txt}")
    if tab.psd_lna is not None:
        ax.plot(f, tab.psd_lna, color=_LNA_COLOR, lw=1.4, ls="--", label=tab.lna_label)
    both_ways = False
    if tab.is_current and "current_shot_noise" in ds:
        white = float(ds["current_shot_noise"])
        both_ways = res.current_mean_A is None or not math.isclose(
            white, float(spectra.shot_noise_psd(res.current_mean_A)), rel_tol=0.02)
        if both_ways:  # crossings both ways (a junction): the white level is 2 q (I_out + I_in)
            ax.axhline(white, color="C2", lw=1.0, ls=":",
                       label="shot noise of all crossings, 2q(I$_{out}$+I$_{in}$)")
    if (tab.is_current and not both_ways and res.current_mean_A is not None
            and res.current_mean_A != 0):
        shot = float(spectra.shot_noise_psd(res.current_mean_A))
        ax.axhline(shot, color="C2", lw=1.0, ls=":",
                   label=f"shot noise 2qI, I = {_si(abs(res.current_mean_A), 'A')}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    corners, why = _corners(tab)
    for i, fc in enumerate(corners):
        ax.axvline(fc, color=_CORNER_COLOR, lw=1.0, ls="-.",
                   label="corner frequency" if i == 0 else None)
        tau = 1.0 / (2.0 * math.pi * fc)
        ax.annotate(f"$f_c$ = {_si(fc, 'Hz')}\n$\\tau$ = {_si(tau, 's')}", xy=(fc, 0.04),
                    xycoords=("data", "axes fraction"), xytext=(4, 0),
                    textcoords="offset points", fontsize=8, color=_CORNER_COLOR)
    _flicker_line(res, tab, ax)
    if why and not corners:
        lines = textwrap.wrap(f"no corner: {why}", 80)
        short = "\n".join(lines[:2]) + (" ..." if len(lines) > 2 else "")
        ax.text(0.02, 0.03, short, transform=ax.transAxes, fontsize=7, color="0.35")
    ax.set_xlabel("frequency f [Hz]")
    if tab.is_current:
        ax.set_ylabel("current noise $S_I$ [A²/Hz], one-sided")
        sec = ax.secondary_yaxis("right", functions=(np.sqrt, np.square))
        sec.set_ylabel("$\\sqrt{S_I}$ [A/$\\sqrt{Hz}$]")
        what = "readout current"
    else:
        ax.set_ylabel("count noise $S_N$ [counts²/Hz], one-sided")
        what = _species_label(tab.quantity)
    ax.set_title(_title(res, what, ax), fontsize=10)
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=8, loc="lower left" if not why else "upper right")
    return ax


def _flicker_line(res: Result, tab: Spectrum, ax: Axes) -> None:
    """The fitted K / f^alpha over its band, where the file has the 1/f read-out."""
    fit = res.flicker(tab.quantity)
    if fit is None or fit.band is None or not fit.ok:
        return
    f = np.geomspace(fit.band[0], fit.band[1], 50)
    ax.plot(f, fit.K / f**fit.alpha, color="C1", lw=1.6,
            label=f"K/f$^\\alpha$, $\\alpha$ = {fit.alpha:.3f} ± {fit.alpha_err:.2g}")


def plot_transient(ds: xr.Dataset | Result, ax: Axes | None = None, *,
                   species: str | list[str] | None = None) -> Axes:
    """Ensemble mean +/- one standard deviation of the counts against the continuum.

    Parameters
    ----------
    ds : xarray.Dataset  With ``count_mean``, ``count_var`` (and ``count_continuum``) over
        ``t`` [s]
    ax : matplotlib Axes, optional
    species : str or list of str, optional  Default: all species

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    if "count_mean" not in ds or "t" not in ds.coords:
        return _note(ax, "this file has no count_mean(species, t): no transient to show")
    names = list(res.levels)  # a spread level's total stands for its sub-levels
    chosen = names if species is None else ([species] if isinstance(species, str) else species)
    t = np.asarray(ds["t"].values, dtype=float)
    scale, prefix = _engineering(float(np.max(np.abs(t))) if t.size else 1.0)
    ts = t / scale
    n_traj = res.trajectories
    for i, name in enumerate(chosen):
        color = f"C{i % 10}"
        label = _species_label(name)
        mean = np.asarray(ds["count_mean"].sel(species=name).values, dtype=float)
        if "count_var" in ds:
            sd = np.sqrt(np.maximum(np.asarray(ds["count_var"].sel(species=name).values,
                                               dtype=float), 0.0))
            ax.fill_between(ts, mean - sd, mean + sd, color=color, alpha=0.2, lw=0,
                            label=f"{label}: ± 1 standard deviation")
        ax.plot(ts, mean, color=color, lw=1.2, label=f"{label}: ensemble mean")
        if "count_continuum" in ds:
            cont = np.asarray(ds["count_continuum"].sel(species=name).values, dtype=float)
            ax.plot(ts, cont, color="k", lw=1.0, ls="--",
                    label="continuum rate equations" if i == 0 else None)
    ax.set_xlabel(f"time t [{prefix}s]")
    ax.set_ylabel("count in the volume")
    ax.set_xlim(ts[0], ts[-1])
    sub = "transient" + (f" ({n_traj} trajectories)" if n_traj else "")
    ax.set_title(_title(res, sub, ax), fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8)
    return ax


def plot_histogram(ds: xr.Dataset | Result, species: str, ax: Axes | None = None) -> Axes:
    """Stationary count distribution against the Poisson law of the same mean.

    Parameters
    ----------
    ds : xarray.Dataset  With ``count_histogram`` (species, count_value): time-weighted
        probabilities of each count; ``count_histogram_exact`` is drawn where present
    species : str  Species name
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes

    Notes
    -----
    A one-variable birth-death process with constant generation and first-order loss has a
    Poisson stationary law (var = mean, docs/physics-notes.md); departures show the correlations the
    other channels bring (e.g. a pair constraint narrows the law, Darvey, Ninham & Staff,
    J. Chem. Phys. 45, 2145, 1966).
    """
    from scipy import stats

    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    if "count_histogram" not in ds:
        return _note(ax, "this file has no count_histogram(species, count_value):\n"
                         "no stationary distribution to show")
    h = ds["count_histogram"].sel(species=species)
    n = np.asarray(h["count_value"].values, dtype=float)
    p = np.asarray(h.values, dtype=float)
    if np.all(np.isnan(p) | (p < 0)):  # nan, or the documented fill value -1
        return _note(ax, f"{_species_label(species)}: no histogram stored (its count range "
                         "is too wide to share an axis with the other species)")
    total = float(np.sum(p))
    if not total > 0:
        return _note(ax, f"count_histogram of {species} is empty")
    p = p / total
    mean = float(np.sum(n * p))
    var = float(np.sum((n - mean) ** 2 * p))
    # show the support: where either law has non-negligible probability
    pois_all = stats.poisson.pmf(n, mean)
    shown = np.nonzero((p > 1e-4 * p.max()) | (pois_all > 1e-4 * pois_all.max()))[0]
    window = slice(shown[0], shown[-1] + 1)
    n, p = n[window], p[window]
    ax.bar(n, p, width=0.9 if n.size < 60 else 1.0, color=_MC_COLOR, alpha=0.6,
           label="exact (master equation)" if res.exact else "Monte Carlo (time-weighted)")
    pois = stats.poisson.pmf(n, mean)
    marker = "o" if n.size <= 60 else None
    ax.plot(n, pois, color="k", lw=1.0, marker=marker, ms=3,
            label=f"Poisson, same mean {mean:.3g}")
    if "count_histogram_exact" in ds:
        ex = np.asarray(ds["count_histogram_exact"].sel(species=species).values,
                        dtype=float)[window]
        ax.plot(n, ex, color=_CORNER_COLOR, lw=0, marker="x", ms=6, mew=1.5, zorder=3,
                label="exact law")
    ax.set_xlabel(f"count of {_species_label(species)}")
    ax.set_ylabel("probability")
    fano = var / mean if mean > 0 else float("nan")
    ax.text(0.98, 0.97, f"mean {mean:.4g}\nvariance {var:.4g}\nvariance/mean {fano:.3g}",
            transform=ax.transAxes, ha="right", va="top", fontsize=8,
            bbox={"boxstyle": "round", "fc": "white", "ec": "0.8"})
    sub = f"stationary distribution: {_species_label(species)}"
    ax.set_title(_title(res, sub, ax), fontsize=10)
    top = max(float(np.max(p)), float(np.max(pois_all[window])))
    ax.set_ylim(0, 1.5 * top)  # headroom for the legend and the summary box
    ax.legend(fontsize=8, loc="upper left")
    ax.grid(True, axis="y", alpha=0.3)
    return ax


def plot_event_rates(ds: xr.Dataset | Result, ax: Axes | None = None) -> Axes:
    """Horizontal bars of the mean event rate per channel, log scale.

    Parameters
    ----------
    ds : xarray.Dataset  With ``event_rate`` (channel) [1/s per trajectory]
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    res = _as_result(ds)
    ds = res.ds
    if "event_rate" not in ds:
        return _note(_new_axes(ax), "this file has no event_rate(channel)")
    names = [str(c) for c in ds["channel"].values]
    rates = np.asarray(ds["event_rate"].values, dtype=float)
    ax = _new_axes(ax, (7.5, 0.9 + 0.32 * len(names)))
    y = np.arange(len(names))
    positive = rates > 0
    floor = float(np.min(rates[positive])) / 10 if np.any(positive) else 1.0
    ax.barh(y[positive], rates[positive], color=_MC_COLOR, height=0.7)
    ax.set_xscale("log")
    for yi, r in zip(y, rates):
        if r > 0:
            ax.annotate(f"{r:.3g} /s", xy=(r, yi), xytext=(3, 0), textcoords="offset points",
                        va="center", fontsize=7)
        else:
            ax.annotate("no events", xy=(0, yi), xycoords=("axes fraction", "data"),
                        xytext=(4, 0), textcoords="offset points", va="center", fontsize=7,
                        color="0.4", style="italic")
    ax.set_yticks(y, names, fontsize=8)
    ax.set_ylim(len(names) - 0.4, -0.6)  # first channel on top, room for every row
    hi = float(np.max(rates[positive])) if np.any(positive) else 10.0
    ax.set_xlim(floor, hi * 30)
    ax.set_xlabel("mean event rate per trajectory [1/s]")
    ax.set_title(_title(res, "event channels", ax), fontsize=10)
    ax.grid(True, axis="x", which="major", alpha=0.3)
    return ax


def _pixel_kind(ds: xr.Dataset) -> str | None:
    for kind in ("current", "count"):
        if f"pixel_{kind}_noise" in ds:
            return kind
    return None


def plot_population(ds: xr.Dataset | Result, which: int | str = "mean", ax: Axes | None = None
                    ) -> Axes:
    """Histogram across pixels of the mean readout (``which="mean"``) or of the noise at the
    ``which``-th chosen frequency, with the threshold and the fraction above it.

    Parameters
    ----------
    ds : xarray.Dataset  A run with a ``[population]`` section
    which : "mean" or int  Index into ``noise_frequency``
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    kind = _pixel_kind(ds)
    if kind is None:
        return _note(ax, "this file has no pixel population (add a [population] section)")
    unit = "A" if kind == "current" else "counts"
    if which == "mean":
        vals = np.asarray(ds[f"pixel_{kind}_mean"].values, dtype=float)
        ax.hist(vals, bins=min(40, max(8, vals.size // 8)), color=_MC_COLOR, alpha=0.7)
        ax.set_xlabel(f"mean {'current' if kind == 'current' else 'electron count'} of a pixel "
                      f"[{unit}]")
        sub = "spread of the mean readout across pixels"
    else:
        j = int(which)
        f = float(ds["noise_frequency"].values[j])
        vals = np.asarray(ds[f"pixel_{kind}_noise"].values[:, j], dtype=float)
        silent = int(np.sum(~(vals > 0)))  # e.g. pixels without traps that never switched
        vals = vals[vals > 0]
        if not vals.size:
            return _note(ax, f"no pixel has noise at {_si(f, 'Hz')}")
        edges = np.geomspace(vals.min() * 0.9, vals.max() * 1.1, 30)
        ax.hist(vals, bins=edges, color=_MC_COLOR, alpha=0.7)
        ax.set_xscale("log")
        ax.set_xlabel(f"pixel noise at {_si(f, 'Hz')} [{unit}^2/Hz]"
                      + (f" ({silent} pixels without noise not shown)" if silent else ""))
        sub = f"spread of the noise across pixels at {_si(f, 'Hz')}"
        thr = ds.attrs.get("population_threshold")
        if thr is not None and "fraction_above_threshold" in ds:
            p = float(ds["fraction_above_threshold"].values[j])
            e = float(ds["fraction_above_threshold_stderr"].values[j])
            ax.axvline(float(thr), color=_CORNER_COLOR, ls="--",
                       label=f"threshold: {100 * p:.1f} ± {100 * e:.1f} % of pixels above")
            ax.legend(fontsize=8)
    ax.set_ylabel("pixels")
    ax.set_title(_title(res, sub, ax), fontsize=10)
    ax.grid(True, alpha=0.3)
    return ax


def plot_worst_pixels(ds: xr.Dataset | Result, ax: Axes | None = None) -> Axes:
    """Band-averaged spectra of the noisiest pixels beside the population median."""
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    kind = _pixel_kind(ds)
    if kind is None:
        return _note(ax, "this file has no pixel population (add a [population] section)")
    f = np.asarray(ds["pixel_frequency"].values, dtype=float)
    spec = np.asarray(ds[f"pixel_{kind}_spectrum"].values, dtype=float)
    ax.loglog(f, np.median(spec, axis=0), color="k", lw=2, label="median pixel")
    for rank, i in enumerate(np.asarray(ds["worst_pixel"].values, dtype=int)):
        ax.loglog(f, spec[i], lw=1, color=f"C{rank + 1}", label=f"pixel {i} (rank {rank + 1})")
    unit = "A^2/Hz" if kind == "current" else "counts^2/Hz"
    ax.set_xlabel("frequency f [Hz]")
    ax.set_ylabel(f"band-averaged PSD [{unit}]")
    f0 = float(ds["noise_frequency"].values[0])
    ax.axvline(f0, color=_CORNER_COLOR, ls=":", lw=1)
    ax.set_title(_title(res, f"noisiest pixels at {_si(f0, 'Hz')}", ax), fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7)
    return ax


_DEVIATIONS = {
    "mean": ("deviation_mean", "mean count vs continuum"),
    "var": ("deviation_var", "variance vs linear noise"),
    "tau": ("deviation_tau", "correlation time vs linear noise"),
}


def _predicted_deviation(ax: Axes, ds, species: str, color: str) -> None:
    """The next-order prediction |mean_next_order / continuum| of a sweep file's points,
    dashed, beside the measured deviations of the same species."""
    if "mean_next_order" not in ds or "steady_continuum" not in ds:
        return
    x = np.asarray(ds["stationary_mean"].sel(species=species).values, dtype=float)
    ss = np.asarray(ds["steady_continuum"].sel(species=species).values, dtype=float)
    delta = np.asarray(ds["mean_next_order"].sel(species=species).values, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = np.abs(delta / ss)
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    if np.count_nonzero(ok) < 1:
        return
    order = np.argsort(x[ok])
    ax.plot(x[ok][order], y[ok][order], ls="--", lw=1.2, color=color, marker="x", ms=4,
            label=f"{species}: predicted (next-order correction / continuum)")


def plot_validity(ds: xr.Dataset | Result, quantity: str = "mean", ax: Axes | None = None
                  ) -> Axes:
    """Where the continuum answer fails: |relative deviation| against the mean count.

    One line per carrier species of a sweep file (``deviation_<quantity>`` with its standard
    error as error bars, against ``stationary_mean``, log-log), the 10 % level drawn, and the
    count where each line crosses it marked (:func:`grmc.result.crossing_count`).  For the
    mean, the deviation the next-order correction predicts (``mean_next_order`` over the
    continuum mean; Grima, J. Chem. Phys. 133, 035101, 2010) is drawn dashed beside the
    measured points.

    Parameters
    ----------
    ds : xarray.Dataset  A sweep file (dims sweep, species)
    quantity : "mean", "var" or "tau"
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    name, what = _DEVIATIONS[quantity]
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    if name not in ds:
        return _note(ax, f"this file has no {name} (not a sweep file)")
    drew = False
    for k, sp in enumerate(ds["species"].values):
        sp = str(sp)
        if sp.startswith("trapped:"):
            continue
        x = np.asarray(ds["stationary_mean"].sel(species=sp).values, dtype=float)
        y = np.abs(np.asarray(ds[name].sel(species=sp).values, dtype=float))
        err = np.asarray(ds[name + "_stderr"].sel(species=sp).values, dtype=float)
        ok = np.isfinite(x) & np.isfinite(y) & (x > 0)
        if not np.any(ok):
            continue
        order = np.argsort(x[ok])
        xs, ys, es = x[ok][order], y[ok][order], err[ok][order]
        floor = 1e-6
        ax.errorbar(xs, np.maximum(ys, floor), yerr=np.where(np.isfinite(es), es, 0),
                    marker="o", ms=4, lw=1.2, capsize=2, color=f"C{k}", label=sp)
        if quantity == "mean":
            _predicted_deviation(ax, ds, sp, f"C{k}")
        cross = crossing_count(xs, ys, DEVIATION_THRESHOLD)
        if cross is not None:
            ax.axvline(cross, color=f"C{k}", ls=":", lw=1)
            ax.annotate(f"{sp}: {cross:.3g}", xy=(cross, DEVIATION_THRESHOLD),
                        xytext=(4, 6 + 12 * k), textcoords="offset points", fontsize=8,
                        color=f"C{k}")
        drew = True
    if not drew:
        return _note(ax, "no finite deviations to draw")
    ax.axhline(DEVIATION_THRESHOLD, color=_CORNER_COLOR, ls="--", lw=1,
               label=f"{DEVIATION_THRESHOLD:.0%} deviation")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("mean carrier count in the volume")
    ax.set_ylabel("|relative deviation|")
    ax.set_title(_title(res, f"where the continuum fails: {what}", ax), fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    return ax


def _swept_axis(ds: xr.Dataset) -> tuple[np.ndarray, str]:
    """Values and label of the first swept key of a sweep file."""
    key = str(ds.attrs.get("swept_keys", "")).split(" ")[0]
    if key not in ds.coords:
        return np.arange(ds.sizes["sweep"], dtype=float), "sweep point"
    units = ds[key].attrs.get("units", "1")
    label = "temperature (K)" if key == "material.temperature_K" else (
        key if units == "1" else f"{key} ({units})")
    return np.asarray(ds[key].values, dtype=float), label


def plot_sweep_noise(ds: xr.Dataset | Result, ax: Axes | None = None) -> Axes:
    """Readout noise at the recorded frequencies against the swept key (e.g. temperature).

    Per frequency of a sweep file: the exact or Monte Carlo current PSD (markers),
    ``current_psd_lna`` (line), the photon term ``current_psd_photon`` (dashed) and twice it
    (dotted), the background-limited G-R level (generation plus recombination of the
    photocarriers) which the noise meets where the light's carriers dominate.

    Parameters
    ----------
    ds : xarray.Dataset  A sweep file with ``current_psd_lna`` (dims sweep, frequency)
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    if "current_psd_lna" not in ds:
        return _note(ax, "this sweep has no readout noise (the scenario has no [readout])")
    x, label = _swept_axis(ds)
    order = np.argsort(x)
    x = x[order]
    for k, f in enumerate(np.asarray(ds["frequency"].values, dtype=float)):
        color = f"C{k}"
        at = f"{_si(f, 'Hz')}"
        sim = np.asarray(ds["current_psd"].values[:, k], dtype=float)[order]
        ax.plot(x, sim, "o", ms=4, color=color, label=f"readout noise at {at} (exact / MC)")
        lna = np.asarray(ds["current_psd_lna"].values[:, k], dtype=float)[order]
        ax.plot(x, lna, "-", lw=1.2, color=color, label=f"linear noise at {at}")
        photon = np.asarray(ds["current_psd_photon"].values[:, k], dtype=float)[order]
        if np.any(photon > 0):
            ax.plot(x, np.where(photon > 0, photon, np.nan), "--", lw=1.2, color=color,
                    alpha=0.8, label="photon (background) shot noise")
            ax.plot(x, np.where(photon > 0, 2 * photon, np.nan), ":", lw=1.2, color=color,
                    alpha=0.8, label="background limit, 2 x photon (gen. + rec.)")
    ax.set_yscale("log")
    ax.set_xlabel(label)
    ax.set_ylabel("current noise (A$^2$/Hz)")
    sub = "readout noise against " + ("temperature" if label.startswith("temp") else label)
    ax.set_title(_title(res, sub, ax), fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7)
    return ax


def plot_population_sweep(ds: xr.Dataset | Result, which: str = "telegraph",
                          ax: Axes | None = None) -> Axes:
    """A sweep of pixel populations: telegraph-like fraction or median noise against the
    swept key (the pixel volume).

    Parameters
    ----------
    ds : xarray.Dataset or Result  A sweep file with a population at every point
    which : "telegraph" or "noise"
        "telegraph": the fraction of pixels one single trap dominates, with its binomial
        standard error, one line per chosen frequency.  "noise": the median over the pixels
        of the readout noise relative to the squared mean readout (S / mean^2) [1/Hz], with
        a line ~ 1/volume through the largest pixel (the area law of 1/f noise, common
        practice).
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _new_axes(ax)
    res = _as_result(ds)
    ds = res.ds
    if "telegraph_fraction" not in ds:
        return _note(ax, "this file has no population per sweep point")
    x, label = _swept_axis(ds)
    order = np.argsort(x)
    x = x[order]
    freqs = np.asarray(ds["noise_frequency"].values, dtype=float)
    kind = "current" if "pixel_current_relative_noise_median" in ds else "count"
    for j, f in enumerate(freqs):
        if which == "telegraph":
            y = np.asarray(ds["telegraph_fraction"].values[:, j])[order]
            e = np.asarray(ds["telegraph_fraction_stderr"].values[:, j])[order]
            ax.errorbar(x, y, yerr=e, marker="o", ms=4, capsize=2, color=f"C{j}",
                        label=f"at {_si(f, 'Hz')}")
        else:
            y = np.asarray(ds[f"pixel_{kind}_relative_noise_median"].values[:, j])[order]
            ax.plot(x, y, marker="o", ms=4, color=f"C{j}", label=f"at {_si(f, 'Hz')}")
            if np.isfinite(y[-1]) and y[-1] > 0:
                ax.plot(x, y[-1] * x[-1] / x, color=f"C{j}", ls=":", lw=1,
                        label="~ 1/volume (area law)" if j == 0 else None)
    ax.set_xscale("log")
    what = "current" if kind == "current" else "electron count"
    if which == "telegraph":
        ax.set_ylim(-0.02, 1.02)
        ax.set_ylabel("fraction of telegraph-like pixels")
        sub = "pixels one single trap dominates"
    else:
        ax.set_yscale("log")
        ax.set_ylabel(f"median {what} noise / mean$^2$ [1/Hz]")
        sub = "median relative noise of the pixels"
    ax.set_xlabel(label)
    ax.set_title(_title(res, sub, ax), fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    return ax


# --------------------------------------------------------------------------------------------
def _grid(n: int, size: tuple[float, float] = _PANEL) -> tuple[Any, list[Axes]]:
    from matplotlib.figure import Figure

    ncols = 1 if n == 1 else 2
    nrows = -(-n // ncols)
    fig = Figure(figsize=(size[0] * ncols, size[1] * nrows), layout="constrained")
    axes = [fig.add_subplot(nrows, ncols, i + 1) for i in range(n)]
    return fig, axes


def _save(fig: Any, target: Path, written: list[Path]) -> None:
    with atomic_target(target) as tmp:
        fig.savefig(tmp, dpi=DPI, format="png")
    written.append(target)


def _plot_sweep(res: Result, out: Path, stem: str) -> list[Path]:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(18.0, 5.0), layout="constrained")
    axes = [fig.add_subplot(1, 3, i + 1) for i in range(3)]
    for quantity, ax in zip(("mean", "var", "tau"), axes):
        plot_validity(res, quantity, ax=ax)
    written: list[Path] = []
    _save(fig, out / f"{stem}_validity.png", written)
    if res.has("current_psd_lna"):  # readout noise against the swept key
        fig, (ax,) = _grid(1, (7.2, 4.8))
        plot_sweep_noise(res, ax=ax)
        _save(fig, out / f"{stem}_readout_noise.png", written)
    if res.has("telegraph_fraction"):  # a population at every point
        fig, axes = _grid(2, (6.4, 4.8))
        plot_population_sweep(res, "telegraph", ax=axes[0])
        plot_population_sweep(res, "noise", ax=axes[1])
        _save(fig, out / f"{stem}_population_sweep.png", written)
    return written


def _plot_population_figures(res: Result, save) -> None:
    n_f = res.ds.sizes["noise_frequency"]
    fig, axes = _grid(1 + n_f, (6.4, 4.0))
    plot_population(res, "mean", ax=axes[0])
    for j, ax in enumerate(axes[1:]):
        plot_population(res, j, ax=ax)
    save(fig, "population")
    fig, (ax,) = _grid(1, (7.2, 4.8))
    plot_worst_pixels(res, ax=ax)
    save(fig, "worst_pixels")


def plot_all(path_nc: str | os.PathLike[str] | Result, outdir: str | os.PathLike[str] | None = None,
             *, stem: str | None = None) -> list[Path]:
    """Write the figures of an output file as PNGs.

    Parameters
    ----------
    path_nc : path or Result  Output NetCDF file (read with :func:`grmc.result.open_result`)
    outdir : path, optional  Directory for the PNGs (default: next to the file)
    stem : str, optional  File name stem (default: the file's)

    Returns
    -------
    list of Path  Written files, among ``<stem>_psd.png`` (count spectra, one panel per
        species, a spread trap level's sub-levels left out), ``<stem>_current_psd.png``,
        ``<stem>_transient.png``, ``<stem>_histogram.png``, ``<stem>_population.png``,
        ``<stem>_worst_pixels.png``, ``<stem>_rates.png`` and, for a sweep,
        ``<stem>_validity.png`` (with a population per point also
        ``<stem>_population_sweep.png``); a figure whose
        variables the file lacks is skipped (an empty list: nothing to draw).
    """
    if isinstance(path_nc, Result):
        res, default_dir, stem = path_nc, Path("."), stem or "grmc"
    else:
        res, default_dir = open_result(path_nc), Path(path_nc).parent
        stem = stem or Path(path_nc).stem
    out = Path(outdir) if outdir is not None else default_dir  # made by the first figure
    if res.has("deviation_mean"):  # a sweep file: the validity figure
        return _plot_sweep(res, out, stem)
    if res.sweep_points:
        res = res.point(0)
    ds = res.ds
    written: list[Path] = []

    def save(fig: Any, name: str) -> None:
        _save(fig, out / f"{stem}_{name}.png", written)

    # a spread trap level's sub-levels stay in the file; the figures show the level's total
    names = list(res.levels)
    if "psd" in ds and names:
        fig, axes = _grid(len(names))
        for name, ax in zip(names, axes):
            plot_psd(res, name, ax=ax)
        save(fig, "psd")
    if res.has_current:
        fig, (ax,) = _grid(1, (7.2, 4.8))
        plot_psd(res, "current", ax=ax)
        save(fig, "current_psd")
    if "count_mean" in ds and names:
        fig, axes = _grid(len(names), (6.4, 3.8))
        for name, ax in zip(names, axes):
            plot_transient(res, ax=ax, species=name)
        save(fig, "transient")
    if "count_histogram" in ds and names:
        fig, axes = _grid(len(names), (6.4, 3.8))
        for name, ax in zip(names, axes):
            plot_histogram(res, name, ax=ax)
        save(fig, "histogram")
    if _pixel_kind(ds) is not None:
        _plot_population_figures(res, save)
    if "event_rate" in ds:
        n_ch = ds.sizes.get("channel", 1)
        fig, (ax,) = _grid(1, (8.0, 1.3 + 0.3 * n_ch))
        plot_event_rates(res, ax=ax)
        save(fig, "rates")
    return written
