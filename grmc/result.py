"""One typed view of an output file, built once, read by the figures and the printed tables.

A grmc file comes from ``run`` (Monte Carlo), ``exact`` (master equation) or ``sweep``.
Which one it is, where a spectrum's interval and segment count are kept, what the readout
current is: all of that is decided here and nowhere else.  :func:`read_dataset` also says
plainly what a file is not (empty, text, truncated NetCDF, NetCDF from another program).

Public API
----------
read_dataset(path) -> xarray.Dataset        (raises NotAGrmcFile)
open_result(path) -> Result
from_dataset(ds) -> Result
Result.spectrum(quantity) -> Spectrum
Result.flicker(quantity) -> PowerLaw or None
Result.fit(quantity) -> StoredFit or None
Result.band_noise() -> BandNoise or None
as_result(ds_or_path) -> Result
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from . import spectra
from .spread import is_sublevel  # sub-levels are kept in files, left out of tables and figures

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = ["NotAGrmcFile", "Spectrum", "PowerLaw", "StoredFit", "BandNoise", "Result",
           "is_sublevel", "read_dataset", "open_result", "from_dataset", "as_result",
           "METHOD_MC", "METHOD_EXACT", "METHOD_SWEEP", "DEVIATION_THRESHOLD",
           "crossing_count"]

METHOD_MC, METHOD_EXACT, METHOD_SWEEP = "monte carlo", "exact", "sweep"
#: A relative deviation of this size marks where the continuum answer fails (sweep files).
DEVIATION_THRESHOLD = 0.10
_DRIFT = "drift current of the biased bar, I = q bias/L^2 (mu_n N_e + mu_p N_h)"
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_CLASSIC_SIGNATURES = (b"CDF\x01", b"CDF\x02", b"CDF\x05")
_WELCH = "nu = 2K degrees of freedom; Welch, IEEE Trans. Audio Electroacoust. 15, 70, 1967"


class NotAGrmcFile(ValueError):
    """An input file that is not a grmc output file; the message says what it is not."""


# --------------------------------------------------------------------------------------------
def _sniff(path: Path) -> None:
    """Refuse files that are missing, empty or not NetCDF at all, from their first bytes."""
    if not path.exists():
        raise NotAGrmcFile(f"{path}: no such file")
    if path.is_dir():
        raise NotAGrmcFile(f"{path}: is a folder, not a grmc output file")
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise NotAGrmcFile(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if not head:
        raise NotAGrmcFile(f"{path}: is empty, not a grmc output file")
    if head != _HDF5_SIGNATURE and not head.startswith(_CLASSIC_SIGNATURES):
        raise NotAGrmcFile(f"{path}: is not a NetCDF file (grmc writes NetCDF-4); "
                           "give the .nc file of run, exact or sweep")


def read_dataset(path: str | os.PathLike[str]) -> xr.Dataset:
    """Open a grmc output file fully into memory, after checking that it is one.

    Raises
    ------
    NotAGrmcFile  Missing, empty, not NetCDF, damaged or truncated, written by another
        program, or not following the output contract (:func:`grmc.dataset.validate`).
    """
    import xarray as xr

    from .dataset import OutputError, validate

    path = Path(path)
    _sniff(path)
    try:
        with xr.open_dataset(path, engine="netcdf4") as opened:
            ds = opened.load()
    except Exception as exc:  # netCDF4/HDF5 raise OSError, RuntimeError or ValueError
        raise NotAGrmcFile(f"{path}: is a damaged or truncated NetCDF file "
                           f"({type(exc).__name__})") from None
    if not str(ds.attrs.get("source", "")).startswith("grmc"):
        raise NotAGrmcFile(f"{path}: is a NetCDF file but not a grmc output file (its "
                           "'source' attribute does not name grmc)")
    try:
        validate(ds)
    except OutputError as exc:
        raise NotAGrmcFile(f"{path}: does not follow the grmc file contract ({exc})") from None
    return ds


# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PowerLaw:
    """The 1/f read-out S = K / (f / 1 Hz)^alpha of one quantity, as stored in a run file.

    Attributes
    ----------
    quantity : str  "current" or a species name
    K, K_err : float  Coefficient (S at 1 Hz) and its standard error [units]
    alpha, alpha_err : float  Exponent and its standard error [1]
    corner_Hz : float  Where the line meets a flat level (NaN where none) [Hz]
    band : (float, float) or None  The fit band [Hz]
    units : str  "A^2/Hz" or "counts^2/Hz"
    """

    quantity: str
    K: float
    K_err: float
    alpha: float
    alpha_err: float
    corner_Hz: float
    band: tuple[float, float] | None
    units: str

    @property
    def ok(self) -> bool:
        """True where a line was fitted."""
        return math.isfinite(self.K) and math.isfinite(self.alpha)


@dataclass(frozen=True)
class StoredFit:
    """The Lorentzian fit of one quantity's spectrum, as stored in a run file.

    Attributes
    ----------
    quantity : str  "current" or a species name
    kind : str  "one", "two" or "unresolved" (the fit's verdict)
    plateaus : ndarray  Low-frequency plateau S0 of each component [units]
    corners : ndarray  Corner frequency f_c of each component [Hz]
    white : float  White level the fit was made above (the current's shot noise; 0 for a
        count) [units]
    """

    quantity: str
    kind: str
    plateaus: np.ndarray
    corners: np.ndarray
    white: float


@dataclass(frozen=True)
class BandNoise:
    """The rms noise current over the readout band, as stored in a run file.

    Attributes
    ----------
    rms : float  Estimate (nan where the run did not resolve it) [A]
    low, high : float or None  Its 95 % interval, where stored [A]
    lna : float or None  Linear-noise value, where stored [A]
    band : (float, float) or None  The band [Hz]
    """

    rms: float
    low: float | None
    high: float | None
    lna: float | None
    band: tuple[float, float] | None


@dataclass(frozen=True)
class Spectrum:
    """One spectrum of a file with its interval and theory line.

    Attributes
    ----------
    quantity : str  "current" or a species name
    is_current : bool
    units : str  "A^2/Hz" or "counts^2/Hz"
    frequency : ndarray  [Hz]
    psd, psd_low, psd_high : ndarray  One-sided estimate and its 95 % interval [units]
        (nan bounds for an exact spectrum)
    psd_lna : ndarray or None  Linear-noise spectrum [units]
    n_segments : float or None  K, periodogram values averaged per frequency [1]
    interval_note : str  How the interval was made
    method : str  :data:`METHOD_MC` or :data:`METHOD_EXACT`
    corners : tuple of float  Corner frequencies stored in the file [Hz]; None when the file
        stores no fit
    corner_note : str  Why no corner was resolved, where the file says so
    lna_label : str  What the linear-noise line is (for a pixel population: the average of
        the pixels' own spectra, like the pooled estimate it is drawn beside)
    """

    quantity: str
    is_current: bool
    units: str
    frequency: np.ndarray
    psd: np.ndarray
    psd_low: np.ndarray
    psd_high: np.ndarray
    psd_lna: np.ndarray | None
    n_segments: float | None
    interval_note: str
    method: str
    corners: tuple[float, ...] | None = None
    corner_note: str = ""
    lna_label: str = "linear noise"

    @property
    def exact(self) -> bool:
        """True for a master-equation spectrum."""
        return self.method == METHOD_EXACT

    @property
    def has_interval(self) -> bool:
        """True where the file holds a finite interval."""
        return bool(np.any(np.isfinite(self.psd_low)))


@dataclass(frozen=True)
class Result:
    """What an output file holds, read once.

    Attributes
    ----------
    ds : xarray.Dataset  The file's contents (one point of a sweep is taken by :meth:`point`)
    method : str  :data:`METHOD_MC`, :data:`METHOD_EXACT` or :data:`METHOD_SWEEP`
    title : str  Scenario title
    species : tuple of str
    n_segments : float or None  K of the Monte Carlo spectra [1]
    trajectories : int or None
    seed : int or None
    bias_V : float or None  Readout bias [V]
    current_mean_A : float or None  Mean readout current [A]
    current_definition : str  What the readout current is
    note : str  A remark for figure titles (e.g. the sweep point drawn)
    """

    ds: Any
    method: str
    title: str
    species: tuple[str, ...]
    n_segments: float | None
    trajectories: int | None
    seed: int | None
    bias_V: float | None
    current_mean_A: float | None
    current_definition: str
    note: str = ""
    sweep_points: int = field(default=0)

    @property
    def exact(self) -> bool:
        """True for a ``grmc exact`` file."""
        return self.method == METHOD_EXACT

    @property
    def has_current(self) -> bool:
        """True when the file holds a readout current spectrum."""
        return "current_psd" in self.ds

    def has(self, name: str) -> bool:
        """True when the file holds variable ``name``."""
        return name in self.ds

    def values(self, name: str, species: str | None = None) -> np.ndarray:
        """A variable as a float array (one species' row when ``species`` is given)."""
        da = self.ds[name]
        if species is not None:
            da = da.isel(species=self.species.index(species))
        return np.asarray(da.values, dtype=float)

    def scalar(self, name: str) -> float | None:
        """A scalar variable as float, None when absent."""
        if name not in self.ds or self.ds[name].ndim != 0:
            return None
        return float(self.ds[name].values)

    def point(self, index: int) -> Result:
        """One point of a sweep file as a Result of its own (the others unchanged)."""
        if "sweep" not in self.ds.dims:
            return self
        ds = self.ds.isel(sweep=index)
        method = str(ds["method"].values) if "method" in ds else METHOD_MC
        computed = method in ("exact", "linear-noise")  # no sampling error
        return from_dataset(ds, method=METHOD_EXACT if computed else METHOD_MC,
                            note=f"(sweep point {index + 1} of {self.ds.sizes['sweep']})")

    @property
    def levels(self) -> tuple[str, ...]:
        """The species tables and figures show: every species but the sub-levels of spread
        trap levels (:func:`is_sublevel`; their level's total stands for them)."""
        return tuple(s for s in self.species if not is_sublevel(s))

    def flicker(self, quantity: str) -> PowerLaw | None:
        """The stored 1/f fit of ``quantity`` ("current" or a species), None where the file
        has none."""
        band = self.ds.attrs.get("flicker_band_Hz")
        band = None if band is None else (float(band[0]), float(band[1]))
        if quantity == "current":
            if "current_flicker_exponent" not in self.ds:
                return None
            pre, units = "current_", "A^2/Hz"

            def get(key):
                return float(self.ds[pre + key].values)
        else:
            if "flicker_exponent" not in self.ds or quantity not in self.species:
                return None
            units = "counts^2/Hz"

            def get(key):
                return float(self.values(key, quantity))
        return PowerLaw(quantity, get("flicker_coefficient"), get("flicker_coefficient_stderr"),
                        get("flicker_exponent"), get("flicker_exponent_stderr"),
                        get("flicker_corner_frequency"), band, units)

    @property
    def scenario_text(self) -> str | None:
        """The scenario TOML stored in the file, None where there is none."""
        text = self.ds.attrs.get("scenario_toml")
        return text if isinstance(text, str) else None

    def fit(self, quantity: str) -> StoredFit | None:
        """The stored Lorentzian fit of ``quantity`` ("current" or a species), None where the
        file has none."""
        pre = "current_" if quantity == "current" else ""
        names = (pre + "spectrum_kind", pre + "plateau", pre + "corner_frequency")
        if not all(n in self.ds for n in names):
            return None
        if quantity == "current":
            kind = str(self.ds[names[0]].values)
            white = self.scalar("current_shot_noise") or 0.0
            sel: dict[str, int] = {}
        elif quantity in self.species:
            sel = {"species": self.species.index(quantity)}
            kind, white = str(self.ds[names[0]].isel(sel).values), 0.0
        else:
            return None
        return StoredFit(quantity, kind,
                         np.asarray(self.ds[names[1]].isel(sel).values, dtype=float),
                         np.asarray(self.ds[names[2]].isel(sel).values, dtype=float), white)

    def band_noise(self) -> BandNoise | None:
        """The stored rms noise current over the readout band, None where the file has none."""
        rms = self.scalar("current_noise_rms")
        if rms is None:
            return None
        band = self.ds["current_noise_rms"].attrs.get("band_Hz")
        return BandNoise(rms, self.scalar("current_noise_rms_low"),
                         self.scalar("current_noise_rms_high"),
                         self.scalar("current_noise_rms_lna"),
                         None if band is None else (float(band[0]), float(band[1])))

    def spectrum(self, quantity: str | None = None, *, pixel_lna: bool = True) -> Spectrum:
        """The spectrum of ``quantity`` ("current" or a species; default the current where
        present, else electrons).

        ``pixel_lna`` (default) takes, for a pixel population, the average of the pixels' own
        linear-noise spectra as the theory line; False takes the nominal pixel's.

        Raises
        ------
        ValueError  An unknown quantity, or a sweep file (take a :meth:`point` first).
        """
        return _spectrum(self, quantity, pixel_lna)


# --------------------------------------------------------------------------------------------
def _method(ds: xr.Dataset) -> str:
    if "deviation_mean" in ds or ds.attrs.get("kind") == "sweep":
        return METHOD_SWEEP
    if "probability_outside" in ds or ds.attrs.get("method") == "linear-noise":
        return METHOD_EXACT  # computed spectra (master equation, linear noise): no intervals
    return METHOD_MC


def _segments(ds: xr.Dataset) -> float | None:
    for holder in (ds.attrs, ds["psd"].attrs if "psd" in ds else {}):
        for key in ("psd_segments", "n_segments", "segments_total"):
            if key in holder:
                return float(holder[key])
    return None


def _bias(ds: xr.Dataset) -> float | None:
    """Readout bias from the ``readout_bias_V`` attribute, else from the scenario text."""
    if "readout_bias_V" in ds.attrs:
        try:
            return float(ds.attrs["readout_bias_V"])
        except (TypeError, ValueError):
            return None
    try:
        value = tomllib.loads(str(ds.attrs.get("scenario_toml", ""))).get("readout", {})
    except tomllib.TOMLDecodeError:
        return None
    value = value.get("bias_V") if isinstance(value, dict) else None
    return float(value) if isinstance(value, (int, float)) else None


def _optional_int(value) -> int | None:
    try:
        return int(value)
    except (TypeError, ValueError):
        return None


def from_dataset(ds: xr.Dataset, *, method: str | None = None, note: str = "") -> Result:
    """Build the Result of a Dataset already in memory (e.g. straight from ``run``)."""
    species = tuple(str(s) for s in np.asarray(ds["species"].values)) \
        if "species" in ds.coords else ()
    current = None
    if "current_mean" in ds and ds["current_mean"].ndim == 0:
        current = float(ds["current_mean"].values)
    if method is None:
        method = _method(ds)
        if method == METHOD_SWEEP and "sweep" not in ds.dims:  # one point taken out
            method = METHOD_EXACT if "method" in ds and str(ds["method"].values) == "exact" \
                else METHOD_MC
    return Result(
        ds=ds, method=method, title=str(ds.attrs.get("title", "")).strip(),
        species=species, n_segments=_segments(ds),
        trajectories=_optional_int(ds.attrs.get("trajectories")),
        seed=_optional_int(ds.attrs.get("seed")), bias_V=_bias(ds), current_mean_A=current,
        current_definition=str(ds.attrs.get("readout_current", _DRIFT)), note=note,
        sweep_points=int(ds.sizes.get("sweep", 0)),
    )


def open_result(path: str | os.PathLike[str]) -> Result:
    """Read an output file (:func:`read_dataset`) into a :class:`Result`."""
    return from_dataset(read_dataset(path))


def as_result(obj: Any) -> Result:
    """A :class:`Result` from a Result, a Dataset in memory or the path of an output file."""
    if isinstance(obj, Result):
        return obj
    if isinstance(obj, (str, os.PathLike)):
        return open_result(obj)
    return from_dataset(obj)


# --------------------------------------------------------------------------------------------
def _row(res: Result, name: str, species: str | None) -> np.ndarray | None:
    if name not in res.ds:
        return None
    return res.values(name, species)


def _stored_corners(res: Result, quantity: str, is_current: bool
                    ) -> tuple[tuple[float, ...] | None, str]:
    name = "current_corner_frequency" if is_current else "corner_frequency"
    if name not in res.ds:
        return None, ""
    vals = np.atleast_1d(res.values(name, None if is_current else quantity))
    corners = tuple(float(v) for v in vals if math.isfinite(v) and v > 0)
    return corners, "" if corners else "no corner resolved"


def _interval_note(res: Result, low: np.ndarray, n_seg: float | None) -> str:
    if res.exact:
        return "none (an exact master-equation spectrum; psd_low, psd_high are nan)"
    if not np.any(np.isfinite(low)):
        return "none in the file (psd_low, psd_high are nan)"
    k_txt = f"K = {n_seg:.6g}" if n_seg is not None else "K"
    return ("psd_low .. psd_high is the 95 % chi-squared interval of an average of "
            f"{k_txt} periodogram values ({_WELCH})")


def _current_interval(res: Result, psd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The current's interval from the file, else from the count intervals: every spectrum
    of a run averages the same K periodogram values, so the relative interval is shared."""
    low, high = _row(res, "current_psd_low", None), _row(res, "current_psd_high", None)
    if low is not None and high is not None:
        return low, high
    if all(n in res.ds for n in ("psd", "psd_low", "psd_high")) and res.species:
        ref = res.values("psd", res.species[0])
        with np.errstate(divide="ignore", invalid="ignore"):
            return (psd * res.values("psd_low", res.species[0]) / ref,
                    psd * res.values("psd_high", res.species[0]) / ref)
    return np.full_like(psd, np.nan), np.full_like(psd, np.nan)


def _check_one_point(res: Result, name: str) -> None:
    """Refuse a spectrum variable with more dimensions than (species, frequency)."""
    if res.method == METHOD_SWEEP or "sweep" in res.ds.dims:
        raise ValueError("a sweep file holds one spectrum per point: take result.point(i) "
                         "(or select one point first, e.g. ds.isel(sweep=0))")
    extra = [d for d in res.ds[name].dims if d not in ("species", "frequency")]
    if extra:
        raise ValueError(f"{name} has dimensions {tuple(res.ds[name].dims)}: select one "
                         f"point first, e.g. ds.isel({extra[0]}=0)")


def _spectrum(res: Result, quantity: str | None, pixel_lna: bool = True) -> Spectrum:
    if res.method == METHOD_SWEEP or "sweep" in res.ds.dims:
        _check_one_point(res, "frequency")
    quantity = quantity or ("current" if res.has_current else "electrons")
    if quantity == "current":
        if not res.has_current:
            raise ValueError("this file has no current_psd (the scenario has no [readout]); "
                             f"give a species instead: {', '.join(res.species)}")
        _check_one_point(res, "current_psd")
        psd = res.values("current_psd")
        low, high = _current_interval(res, psd)
        lna_name, units, is_current = "current_psd_lna", "A^2/Hz", True
    else:
        if quantity not in res.species or "psd" not in res.ds:
            opts = ", ".join((["current"] if res.has_current else []) + list(res.species))
            raise ValueError(f"unknown quantity {quantity!r}; this file has: {opts}")
        _check_one_point(res, "psd")
        psd = res.values("psd", quantity)
        low = _row(res, "psd_low", quantity)
        high = _row(res, "psd_high", quantity)
        if low is None or high is None:
            low = high = np.full_like(psd, np.nan)
        lna_name, units, is_current = "psd_lna", "counts^2/Hz", False
    pixels = pixel_lna and res.has(lna_name + "_pixels")
    lna = _row(res, lna_name + ("_pixels" if pixels else ""), None if is_current else quantity)
    lna_label = "linear noise, average of the pixels' own" if pixels else "linear noise"
    n_seg = res.n_segments
    if n_seg is None and np.any(np.isfinite(low)):
        try:
            n_seg = spectra.segments_from_interval(psd, low, high)
        except ValueError:
            n_seg = None
    corners, why = _stored_corners(res, quantity, is_current)
    return Spectrum(
        quantity=quantity, is_current=is_current, units=units,
        frequency=np.asarray(res.ds["frequency"].values, dtype=float), psd=psd, psd_low=low,
        psd_high=high, psd_lna=lna, n_segments=n_seg,
        interval_note=_interval_note(res, low, n_seg),
        method=METHOD_EXACT if res.exact else METHOD_MC, corners=corners, corner_note=why,
        lna_label=lna_label,
    )


def crossing_count(mean_count: np.ndarray, deviation: np.ndarray,
                   threshold: float = DEVIATION_THRESHOLD) -> float | None:
    """Mean count at which |deviation| falls through ``threshold`` (log-interpolated).

    Returns the largest count where the deviation, coming from large counts, first exceeds the
    threshold; None when it never crosses within the sweep.
    """
    order = np.argsort(mean_count)[::-1]
    x = np.asarray(mean_count, dtype=float)[order]
    y = np.abs(np.asarray(deviation, dtype=float)[order])
    for k in range(1, len(x)):
        if y[k - 1] < threshold <= y[k] and x[k] > 0 and x[k - 1] > 0:
            ly0, ly1 = math.log(max(y[k - 1], 1e-300)), math.log(y[k])
            w = (math.log(threshold) - ly0) / (ly1 - ly0) if ly1 != ly0 else 0.0
            return float(math.exp(math.log(x[k - 1]) + w * (math.log(x[k]) - math.log(x[k - 1]))))
    return None
