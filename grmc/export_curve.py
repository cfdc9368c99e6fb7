"""What a circuit export writes: one smooth spectrum over a wide band, and where it came from.

A circuit simulator extends a table flat beyond its last point, and a noise analysis often
runs from 1 Hz to beyond 100 GHz, so every circuit export (SPICE, Verilog-A, CSV) covers a
band chosen by the user (default :data:`DEFAULT_BAND_HZ`) with one of three sources:

``fit``  the Lorentzian fit stored in the file (``grmc run``), where it passed its checks,
         plus the white (shot) level the fit was made above;
``lna``  the linear-noise spectrum, recomputed at any frequency from the scenario text
         stored in the file (``scenario_toml``) through :mod:`grmc.model`,
         :mod:`grmc.continuum` and :mod:`grmc.readout`;
``mc``   the Monte Carlo estimate (or a ``grmc exact`` file's exact spectrum) smoothed over
         bands 1/20 decade wide, inside the simulated band; outside it the fitted or, failing
         that, the linear-noise tails.

The default is ``fit`` where the fit passed, else ``lna`` (else ``mc`` for a file without a
scenario text).  Every export states the largest deviation of its curve from the Monte Carlo
estimate over the simulated band.

Public API
----------
DEFAULT_BAND_HZ, MAX_FREQUENCY_HZ, SOURCES
ExportOptionError(option, message)
parse_band(text) -> (f1, f2)
export_curve(ds, tab, *, source=None, band=DEFAULT_BAND_HZ) -> ExportCurve

The file is read through :mod:`grmc.result` (its spectrum, stored fit and scenario text).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from .rational import RationalSpectrum, lna_rational
from .result import Result, as_result

__all__ = ["DEFAULT_BAND_HZ", "MAX_FREQUENCY_HZ", "SOURCES", "ExportOptionError",
           "ExportCurve", "parse_band", "export_curve"]

#: Default band of a circuit export: 1 Hz to 100 GHz [Hz].
DEFAULT_BAND_HZ = (1.0, 1.0e11)
#: Highest frequency an export reaches: beyond about 1 THz a carrier transition is no longer
#: instantaneous against the period, and the rate picture behind every source fails [Hz].
MAX_FREQUENCY_HZ = 1.0e12
SOURCES = ("fit", "lna", "mc")
#: Smoothing and table density of the Monte Carlo curve [points per decade].
PER_DECADE = 20


class ExportOptionError(ValueError):
    """A bad export option (``--source``, ``--band``, ``--quantity``, ``--format``)."""

    def __init__(self, option: str, message: str) -> None:
        self.option = option
        super().__init__(f"{option}: {message}")


@dataclass(frozen=True)
class ExportCurve:
    """The spectrum an export writes.

    Attributes
    ----------
    source : "fit" | "lna" | "mc"
    how : str  What the curve is (the fit's components, the theory, the smoothing)
    band : (float, float)  Band of the export [Hz]
    simulated : (float, float)  Band of the spectrum in the file [Hz]
    curve : callable  S(f) at any f in the band [unit^2/Hz]
    rational : RationalSpectrum or None  The curve as white + Lorentzians (fit, lna)
    tail : str  What stands outside the simulated band (source mc), else ""
    reference : (ndarray, ndarray)  The file's spectrum over the simulated band, smoothed
        like the ``mc`` curve, that deviations are measured against [Hz], [unit^2/Hz]
    reference_name : str  "Monte Carlo estimate" or "exact spectrum"
    stderr : ndarray  Relative standard error of the reference at its points [1]
    """

    source: str
    how: str
    band: tuple[float, float]
    simulated: tuple[float, float]
    curve: Callable[[np.ndarray], np.ndarray]
    rational: RationalSpectrum | None
    tail: str
    reference: tuple[np.ndarray, np.ndarray]
    reference_name: str
    stderr: np.ndarray

    def __call__(self, f: np.ndarray) -> np.ndarray:
        return np.asarray(self.curve(np.asarray(f, dtype=float)), dtype=float)

    def is_simulated(self, f: np.ndarray) -> np.ndarray:
        """True where f lies inside the simulated band."""
        f = np.asarray(f, dtype=float)
        lo, hi = self.simulated
        return (f >= lo * (1 - 1e-12)) & (f <= hi * (1 + 1e-12))

    def deviation(self, other: Callable[[np.ndarray], np.ndarray] | None = None
                  ) -> tuple[float, float, float]:
        """Largest |S/S_ref - 1| over the simulated band, the frequency where it is, and the
        reference's relative standard error there [1, Hz, 1].

        ``other`` (default: this curve) is compared with the smoothed file spectrum at the
        reference points inside the export band."""
        f, s = self.reference
        use = (f >= self.band[0]) & (f <= self.band[1])
        if not np.any(use):
            return float("nan"), float("nan"), float("nan")
        got = (other or self)(f[use])
        dev = np.abs(got / s[use] - 1.0)
        i = int(np.argmax(dev))
        return float(dev[i]), float(f[use][i]), float(self.stderr[use][i])

    def deviation_text(self, other=None, what: str = "the exported curve") -> str:
        dev, at, err = self.deviation(other)
        if not math.isfinite(dev):
            return f"{what} does not overlap the simulated band: no comparison"
        text = (f"largest deviation of {what} from the {self.reference_name} (smoothed over "
                f"1/{PER_DECADE} decade) over the simulated band: {100 * dev:.3g} % at "
                f"{at:.4g} Hz")
        if err > 0:
            text += f", where the estimate's own standard error is {100 * err:.2g} %"
        return text


def parse_band(text: str) -> tuple[float, float]:
    """``"F1:F2"`` -> (f1, f2) [Hz], 0 < f1 < f2 <= :data:`MAX_FREQUENCY_HZ`."""
    parts = str(text).split(":")
    try:
        if len(parts) != 2:
            raise ValueError
        f1, f2 = float(parts[0]), float(parts[1])
    except ValueError:
        raise ExportOptionError("--band", f"expected F1:F2 in Hz (e.g. 1:1e11), got {text!r}"
                                ) from None
    return check_band((f1, f2))


def check_band(band: tuple[float, float]) -> tuple[float, float]:
    """Validate a band [Hz]; raise :class:`ExportOptionError` naming ``--band``."""
    f1, f2 = float(band[0]), float(band[1])
    if not (math.isfinite(f1) and math.isfinite(f2) and 0 < f1 < f2):
        raise ExportOptionError("--band", f"need 0 < F1 < F2, got {f1:g}:{f2:g}")
    if f2 > MAX_FREQUENCY_HZ:
        raise ExportOptionError(
            "--band", f"F2 = {f2:g} Hz is above {MAX_FREQUENCY_HZ:g} Hz, where carrier "
            "transitions are no longer instantaneous and no source of this file holds")
    return f1, f2


# --------------------------------------------------------------------------------------------
# The three sources
# --------------------------------------------------------------------------------------------
def stored_fit(res: Any, quantity: str) -> tuple[RationalSpectrum, str] | None:
    """The file's Lorentzian fit of ``quantity`` where it passed its checks, else None.

    ``res`` is a :class:`grmc.result.Result` (or a Dataset, read into one)."""
    fit = as_result(res).fit(quantity)
    if fit is None or fit.kind not in ("one", "two"):
        return None
    s0, fc = fit.plateaus, fit.corners
    ok = np.isfinite(s0) & np.isfinite(fc)
    if not np.any(ok) or np.any(s0[ok] <= 0) or np.any(fc[ok] <= 0):
        return None
    spec = RationalSpectrum(fit.white, fc[ok], s0[ok])
    parts = [f"{a:.4g} / (1 + (f / {f:.4g} Hz)^2)"
             for f, a in zip(spec.corners, spec.amplitudes)]
    how = (f"the stored fit of {'one Lorentzian' if fit.kind == 'one' else 'two Lorentzians'} "
           "(weighted least squares on the log periodogram, passed its checks): "
           + " + ".join(parts))
    if fit.white > 0:
        how += f" above the white shot level {fit.white:.4g} (current_shot_noise)"
    return spec, how


def lna_theory(res: Any, quantity: str
               ) -> tuple[Callable[[np.ndarray], np.ndarray], RationalSpectrum | None, str] | None:
    """The linear-noise spectrum recomputed from the file's scenario text, or None.

    ``res`` is a :class:`grmc.result.Result` (or a Dataset, read into one).  Returns (curve,
    rational form or None, description)."""
    text = as_result(res).scenario_text
    if text is None:
        return None
    from .continuum import ContinuumError, lna_psd
    from .model import build_model
    from .readout import lna_current
    from .scenario import ScenarioError, load_scenario

    try:
        model = build_model(load_scenario(text=text))
    except (ScenarioError, ValueError, ContinuumError):
        return None
    if quantity == "current":
        if model.scenario.readout is None:
            return None
        direct = (lambda f: lna_current(model, f).psd)
    else:
        if quantity not in model.output_species:  # a spread level's total among them
            return None
        i = list(model.output_species).index(quantity)
        direct = (lambda f: np.real(model.project_matrix(lna_psd(model, f))[i, i]))
    how = ("the linear-noise spectrum (van Kampen's system-size expansion), recomputed from "
           "the scenario text stored in the file")
    try:
        spec = lna_rational(model, quantity)
    except ContinuumError:  # no steady state to expand about: no theory to export
        return None
    except ValueError as exc:
        return direct, None, how + f" (not a sum of Lorentzians: {exc})"
    return spec, spec, how + ": " + spec.describe()


def _smoothed(tab) -> tuple[np.ndarray, np.ndarray]:
    """The file's spectrum on the 1/20-decade grid of its band: band-averaged (estimate) or
    interpolated (exact)."""
    from .export import resample_spectrum

    return resample_spectrum(tab.frequency, tab.psd, points_per_decade=PER_DECADE,
                             smooth=not tab.exact)


def _relative_stderr(tab, f_grid: np.ndarray) -> np.ndarray:
    """Relative standard error of the smoothed estimate at each grid point [1]: an average
    of n bins of K periodogram values each has 1/sqrt(n K) (Welch 1967); 0 for an exact
    spectrum."""
    if tab.exact or not tab.n_segments:
        return np.zeros_like(f_grid)
    f = tab.frequency[np.isfinite(tab.psd) & (tab.psd > 0) & (tab.frequency > 0)]
    lg = np.log10(f_grid)
    half = 0.5 / PER_DECADE
    edges = np.concatenate([[lg[0] - half], 0.5 * (lg[1:] + lg[:-1]), [lg[-1] + half]])
    idx = np.clip(np.searchsorted(edges, np.log10(f), side="right") - 1, 0, lg.size - 1)
    counts = np.bincount(idx, minlength=lg.size)
    return 1.0 / np.sqrt(float(tab.n_segments) * np.maximum(counts, 1))


def _loglog(f_ref: np.ndarray, s_ref: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    lf, ls = np.log(f_ref), np.log(s_ref)
    return lambda f: np.exp(np.interp(np.log(np.asarray(f, float)), lf, ls))


def _choose(res: Result, tab, source: str | None):
    """(source, fit, theory) with the default rule, or refuse the requested source."""
    fit = stored_fit(res, tab.quantity)
    # the theory is recomputed only where it is used: the source, the default without a fit,
    # or the tails of the estimate without a fit
    theory = None if (fit is not None and source in (None, "fit", "mc")) else lna_theory(
        res, tab.quantity)
    if source is None:
        source = "fit" if fit is not None else ("lna" if theory is not None else "mc")
    if source not in SOURCES:
        raise ExportOptionError("--source", f"must be one of {', '.join(SOURCES)}, got "
                                f"{source!r}")
    if source == "fit" and fit is None:
        why = ("this file holds no Lorentzian fit (an exact solution)"
               if tab.exact else "the file's Lorentzian fit did not pass its checks")
        raise ExportOptionError("--source", f"{why}; use --source lna or mc")
    if source == "lna" and theory is None:
        raise ExportOptionError("--source", "the file holds no scenario text to recompute the "
                                "linear-noise spectrum from; use --source fit or mc")
    return source, fit, theory


def export_curve(ds: Any, tab, *, source: str | None = None,
                 band: tuple[float, float] = DEFAULT_BAND_HZ) -> ExportCurve:
    """The spectrum to export, over the band.

    Parameters
    ----------
    ds : grmc.result.Result or xarray.Dataset  Output file contents
    tab : grmc.result.Spectrum  The quantity's spectrum taken out of ``ds``
        (:func:`grmc.export.spectrum_table`)
    source : "fit" | "lna" | "mc" or None  None: fit where it passed, else lna, else mc
    band : (f1, f2)  [Hz]

    Returns
    -------
    ExportCurve

    Raises
    ------
    ExportOptionError  naming ``--source`` for a source the file cannot give, ``--band`` for
        a band the file and its fit cannot support (beyond :data:`MAX_FREQUENCY_HZ`, or
        reaching outside the simulated band with neither a fit nor a scenario text for the
        tails).
    """
    band = check_band(band)
    source, fit, theory = _choose(as_result(ds), tab, source)
    ref = _smoothed(tab)
    sim = (float(ref[0][0]), float(ref[0][-1]))
    name = "exact spectrum" if tab.exact else "Monte Carlo estimate"
    common = dict(band=band, simulated=sim, reference=ref, reference_name=name,
                  stderr=_relative_stderr(tab, ref[0]))
    if source == "fit":
        spec, how = fit
        return ExportCurve("fit", how, curve=spec, rational=spec, tail="", **common)
    if source == "lna":
        curve, spec, how = theory
        return ExportCurve("lna", how, curve=curve, rational=spec, tail="", **common)
    inside = _loglog(*ref)
    outside_needed = band[0] < sim[0] * (1 - 1e-12) or band[1] > sim[1] * (1 + 1e-12)
    tail_curve, tail = None, ""
    if fit is not None:
        tail_curve, tail = fit[0], "the stored Lorentzian fit"
    elif theory is not None:
        tail_curve, tail = theory[0], "the linear-noise spectrum"
    if outside_needed and tail_curve is None:
        raise ExportOptionError(
            "--band", f"{band[0]:g}:{band[1]:g} Hz reaches outside the simulated band "
            f"{sim[0]:.4g}..{sim[1]:.4g} Hz and the file has neither a fit that passed nor a "
            "scenario text for the tails; give a band inside the simulated one")

    def curve(f: np.ndarray) -> np.ndarray:
        f = np.asarray(f, dtype=float)
        s = inside(f)
        out = ~((f >= sim[0] * (1 - 1e-12)) & (f <= sim[1] * (1 + 1e-12)))
        if np.any(out):
            s = np.where(out, tail_curve(np.where(out, f, sim[0])), s)
        return s

    how = (f"the {name}, averaged over bands 1/{PER_DECADE} decade wide and interpolated "
           "log-log" if not tab.exact else "the exact spectrum, interpolated log-log")
    if outside_needed:
        how += f"; outside {sim[0]:.4g}..{sim[1]:.4g} Hz: {tail}"
    return ExportCurve("mc", how, curve=curve, rational=None, tail=tail, **common)
