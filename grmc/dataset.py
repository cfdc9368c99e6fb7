"""The output file's contract: one registry of variables, build, validate, save, load.

Every variable grmc writes is registered once in :data:`VARIABLES` with its dimensions,
UDUNITS string and long name.  :func:`save` validates a Dataset against the registry before
writing and writes atomically (a temporary file in the same folder, then a rename), so a
failed or interrupted run never leaves a partial file where a good one is expected.
:func:`load` validates again.

Conventions followed: NetCDF Climate and Forecast (CF) Metadata Conventions 1.11.  CF
standard names cover no semiconductor quantities, so no ``standard_name`` is set.
"""

from __future__ import annotations

import datetime as _dt
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from ._version import __version__
from .atomic import atomic_target

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

__all__ = ["Var", "VARIABLES", "COORDINATES", "OutputError", "FILL_VALUE", "finish", "validate",
           "save", "load"]

#: Fill value of every floating-point variable: what the file holds where a value is not
#: defined (a Lorentzian fit that resolved no corner, the histogram row of a species whose
#: count range was too wide to store, a correlation time of a count that never fluctuates).
#: It is the netCDF default fill of doubles (NC_FILL_DOUBLE, netCDF User Guide), stored as
#: the variable's ``_FillValue`` attribute, so netCDF and CF readers (xarray among them)
#: show these places as missing (NaN) again; the file itself holds no NaN.
FILL_VALUE = 9.969209968386869e36


class OutputError(ValueError):
    """A Dataset does not follow the output contract."""


@dataclass(frozen=True)
class Var:
    """One registered variable: dims, UDUNITS units, long name, CF cell_methods."""

    dims: tuple[str, ...]
    units: str
    long_name: str
    cell_methods: str | None = None


COORDINATES: dict[str, Var] = {
    "t": Var(("t",), "s", "time since the end of settling"),
    "species": Var(("species",), "1", "carrier species"),
    "frequency": Var(("frequency",), "Hz", "frequency (one-sided)"),
    "channel": Var(("channel",), "1", "event channel"),
    "realization": Var(("realization",), "1", "trajectory index in the ensemble"),
    "count_value": Var(("count_value",), "1", "number of particles in the volume"),
    "component": Var(("component",), "1", "Lorentzian component index"),
    "sweep": Var(("sweep",), "1", "sweep point index"),
    "noise_frequency": Var(("noise_frequency",), "Hz", "frequency of the per-pixel noise"),
    "pixel_frequency": Var(("pixel_frequency",), "Hz", "band centre of the pixel spectra"),
    "frequency_band": Var(("frequency_band",), "Hz",
                          "geometric centre of the frequency band (10 bands per decade)"),
}

_ENS = "realization: mean"
VARIABLES: dict[str, Var] = {
    "count_mean": Var(("species", "t"), "1", "ensemble mean of the count", _ENS),
    "count_var": Var(("species", "t"), "1", "ensemble variance of the count (ddof = 1)",
                     "realization: variance"),
    "count_continuum": Var(("species", "t"), "1",
                           "continuum rate equations from the ensemble mean state at t = 0"),
    "stationary_mean": Var(("species",), "1", "time-weighted mean count over the window",
                           "t: mean realization: mean"),
    "stationary_mean_stderr": Var(("species",), "1",
                                  "standard error of the time-weighted mean count"),
    "stationary_var": Var(("species",), "1",
                          "time-weighted variance of the count about the pooled mean",
                          "t: variance realization: mean"),
    "stationary_var_stderr": Var(("species",), "1",
                                 "standard error of the time-weighted variance"),
    "steady_continuum": Var(("species",), "1", "continuum steady-state count"),
    "var_lna": Var(("species",), "1", "linear-noise variance of the count"),
    "mean_next_order": Var(("species",), "1",
                           "next-order (1/volume) correction of the mean count: predicted "
                           "exact stationary mean minus the continuum steady state"),
    "relaxation_time_lna": Var(("mode",), "s", "linear-noise relaxation time"),
    "psd": Var(("species", "frequency"), "Hz-1",
               "one-sided power spectral density of the count fluctuation", _ENS),
    "psd_low": Var(("species", "frequency"), "Hz-1", "lower end of the 95 % interval of psd"),
    "psd_high": Var(("species", "frequency"), "Hz-1", "upper end of the 95 % interval of psd"),
    "psd_lna": Var(("species", "frequency"), "Hz-1",
                   "linear-noise one-sided power spectral density of the count"),
    "events": Var(("channel",), "1", "events in the window, all trajectories together"),
    "event_rate": Var(("channel",), "s-1", "mean events per second per trajectory", _ENS),
    "current_mean": Var((), "A", "mean readout current", "t: mean realization: mean"),
    "current_mean_continuum": Var((), "A", "continuum steady-state readout current"),
    "current_psd": Var(("frequency",), "A2 Hz-1",
                       "one-sided power spectral density of the readout current", _ENS),
    "current_psd_low": Var(("frequency",), "A2 Hz-1",
                           "lower end of the 95 % interval of current_psd"),
    "current_psd_high": Var(("frequency",), "A2 Hz-1",
                            "upper end of the 95 % interval of current_psd"),
    "current_shot_noise": Var((), "A2 Hz-1",
                              "white level of the collected current, full shot noise of every "
                              "crossing: 2 q (I_out + I_in)"),
    "current_psd_lna": Var(("frequency",), "A2 Hz-1",
                           "linear-noise one-sided power spectral density of the current"),
    "current_noise_rms": Var((), "A", "rms noise current over the readout band [readout] "
                             "band_Hz, square root of the spectrum integrated over the band"),
    "current_noise_rms_low": Var((), "A", "lower end of the 95 % interval of current_noise_rms"),
    "current_noise_rms_high": Var((), "A",
                                  "upper end of the 95 % interval of current_noise_rms"),
    "current_noise_rms_lna": Var((), "A", "linear-noise rms noise current over the readout "
                                 "band"),
    "count_histogram": Var(("species", "count_value"), "1",
                           "time-weighted probability of each count over the window", _ENS),
    "donors": Var(("realization",), "1", "donors in the volume of each trajectory"),
    "acceptors": Var(("realization",), "1", "acceptors in the volume of each trajectory"),
    "trap_count": Var(("realization", "trap_level"), "1", "traps of each level per trajectory"),
    "trajectory_mean": Var(("realization", "species"), "1",
                           "time-weighted mean count of each trajectory", "t: mean"),
    "plateau": Var(("species", "component"), "Hz-1",
                   "low-frequency plateau of each fitted Lorentzian component"),
    "plateau_stderr": Var(("species", "component"), "Hz-1", "standard error of plateau"),
    "corner_frequency": Var(("species", "component"), "Hz",
                            "corner frequency of each fitted Lorentzian component"),
    "corner_frequency_stderr": Var(("species", "component"), "Hz",
                                   "standard error of corner_frequency"),
    "tau_spectrum": Var(("species", "component"), "s",
                        "time constant 1/(2 pi f_c) of each fitted component"),
    "tau_spectrum_stderr": Var(("species", "component"), "s", "standard error of tau_spectrum"),
    "spectrum_kind": Var(("species",), "1",
                         "one or two Lorentzians fitted, or unresolved"),
    "current_plateau": Var(("component",), "A2 Hz-1",
                           "low-frequency plateau of each component of the current spectrum"),
    "current_plateau_stderr": Var(("component",), "A2 Hz-1", "standard error of current_plateau"),
    "current_corner_frequency": Var(("component",), "Hz",
                                    "corner frequency of each component of the current spectrum"),
    "current_corner_frequency_stderr": Var(("component",), "Hz",
                                           "standard error of current_corner_frequency"),
    "current_tau_spectrum": Var(("component",), "s",
                                "time constant 1/(2 pi f_c) of the current spectrum"),
    "current_tau_spectrum_stderr": Var(("component",), "s",
                                       "standard error of current_tau_spectrum"),
    "current_spectrum_kind": Var((), "1", "one or two Lorentzians fitted, or unresolved"),
    "tau_correlation": Var(("species",), "s", "integrated correlation time S(0)/(4 var)"),
    "tau_correlation_stderr": Var(("species",), "s", "standard error of tau_correlation"),
    "tau_correlation_lna": Var(("species",), "s",
                               "linear-noise integrated correlation time S(0)/(4 var)"),
    "deviation_mean": Var(("species",), "1",
                          "relative deviation of the mean count from the continuum"),
    "deviation_mean_stderr": Var(("species",), "1", "standard error of deviation_mean"),
    "deviation_var": Var(("species",), "1",
                         "relative deviation of the variance from the linear-noise value"),
    "deviation_var_stderr": Var(("species",), "1", "standard error of deviation_var"),
    "deviation_tau": Var(("species",), "1",
                         "relative deviation of the correlation time from the linear-noise value"),
    "deviation_tau_stderr": Var(("species",), "1", "standard error of deviation_tau"),
    "response_amplitude": Var(("species",), "1",
                              "amplitude of the mean count's response at the drive frequency"),
    "response_amplitude_stderr": Var(("species",), "1", "standard error of response_amplitude"),
    "response_phase": Var(("species",), "rad",
                          "phase of the response relative to sin(2 pi f t) of the drive"),
    "response_phase_stderr": Var(("species",), "rad", "standard error of response_phase"),
    "response_amplitude_continuum": Var(("species",), "1",
                                        "continuum (linearised) response amplitude"),
    "response_phase_continuum": Var(("species",), "rad", "continuum (linearised) response phase"),
    "current_response_amplitude": Var((), "A", "amplitude of the current's response"),
    "current_response_amplitude_stderr": Var((), "A",
                                             "standard error of current_response_amplitude"),
    "current_response_phase": Var((), "rad", "phase of the current's response"),
    "current_response_phase_stderr": Var((), "rad", "standard error of current_response_phase"),
    "current_response_amplitude_continuum": Var((), "A",
                                                "continuum response amplitude of the current"),
    "current_response_phase_continuum": Var((), "rad",
                                            "continuum response phase of the current"),
    "pixel_current_mean": Var(("realization",), "A", "mean readout current of each pixel"),
    "pixel_count_mean": Var(("realization",), "1", "mean electron count of each pixel"),
    "pixel_current_noise": Var(("realization", "noise_frequency"), "A2 Hz-1",
                               "each pixel's current noise at the chosen frequencies"),
    "pixel_count_noise": Var(("realization", "noise_frequency"), "Hz-1",
                             "each pixel's electron-count noise at the chosen frequencies"),
    "pixel_current_spectrum": Var(("realization", "pixel_frequency"), "A2 Hz-1",
                                  "each pixel's current spectrum, band-averaged"),
    "pixel_count_spectrum": Var(("realization", "pixel_frequency"), "Hz-1",
                                "each pixel's electron-count spectrum, band-averaged"),
    "worst_pixel": Var(("worst",), "1", "pixels with the most noise at the first frequency"),
    "fraction_above_threshold": Var(("noise_frequency",), "1",
                                    "fraction of pixels whose noise exceeds the threshold"),
    "fraction_above_threshold_stderr": Var(("noise_frequency",), "1",
                                           "binomial standard error of that fraction"),
    "single_trap_share": Var(("realization", "noise_frequency"), "1",
                             "largest share of a pixel's readout noise added by one single trap"),
    "telegraph_fraction": Var(("noise_frequency",), "1",
                              "fraction of pixels whose noise one single trap dominates"),
    "telegraph_fraction_stderr": Var(("noise_frequency",), "1",
                                     "binomial standard error of telegraph_fraction"),
    "probability_outside": Var((), "1", "probability mass outside the truncated state space"),
    "intrinsic_density": Var((), "cm-3", "intrinsic carrier density used"),
    "band_gap": Var((), "eV", "band gap of the material at the temperature"),
    "current_psd_photon": Var(("frequency",), "A2 Hz-1",
                              "part of the linear-noise current spectrum driven by the shot "
                              "noise of the optical generation"),
    # band-averaged spectra (10 bands per decade), see grmc.bands
    "psd_band": Var(("species", "frequency_band"), "Hz-1",
                    "PSD of the count averaged over the band's Fourier frequencies", _ENS),
    "psd_band_low": Var(("species", "frequency_band"), "Hz-1",
                        "lower end of the 95 % interval of psd_band (chi-squared with the "
                        "band's 2 K m degrees of freedom: K segments, m Fourier frequencies)"),
    "psd_band_high": Var(("species", "frequency_band"), "Hz-1",
                         "upper end of the 95 % interval of psd_band (chi-squared with the "
                         "band's 2 K m degrees of freedom: K segments, m Fourier frequencies)"),
    "psd_band_lna": Var(("species", "frequency_band"), "Hz-1",
                        "linear-noise PSD averaged over the band's Fourier frequencies"),
    "current_psd_band": Var(("frequency_band",), "A2 Hz-1",
                            "PSD of the readout current averaged over the band's Fourier "
                            "frequencies", _ENS),
    "current_psd_band_low": Var(("frequency_band",), "A2 Hz-1",
                                "lower end of the 95 % interval of current_psd_band "
                                "(chi-squared with the band's 2 K m degrees of freedom)"),
    "current_psd_band_high": Var(("frequency_band",), "A2 Hz-1",
                                 "upper end of the 95 % interval of current_psd_band "
                                 "(chi-squared with the band's 2 K m degrees of freedom)"),
    "current_psd_band_lna": Var(("frequency_band",), "A2 Hz-1",
                                "linear-noise PSD of the readout current averaged over the "
                                "band's Fourier frequencies"),
    "band_frequencies": Var(("frequency_band",), "1",
                            "Fourier frequencies averaged in the band (m)"),
    "pixel_var": Var(("realization", "species"), "1",
                     "each pixel's own time-weighted variance of the count", "t: variance"),
    "pixel_var_lna": Var(("realization", "species"), "1",
                         "linear-noise variance of each pixel's own model"),
    "pixel_steady_continuum": Var(("realization", "species"), "1",
                                  "continuum steady-state count of each pixel's own model"),
    "psd_lna_pixels": Var(("species", "frequency"), "Hz-1",
                          "average over the pixels of each pixel's own linear-noise spectrum"),
    "current_psd_lna_pixels": Var(("frequency",), "A2 Hz-1",
                                  "average over the pixels of each pixel's own linear-noise "
                                  "current spectrum"),
    "pixel_current_noise_median": Var(("noise_frequency",), "A2 Hz-1",
                                      "median over the pixels of the current noise"),
    "pixel_count_noise_median": Var(("noise_frequency",), "Hz-1",
                                    "median over the pixels of the electron-count noise"),
    "pixel_current_relative_noise_median": Var(("noise_frequency",), "Hz-1",
                                               "median over the pixels of the current noise "
                                               "divided by the squared mean current"),
    "pixel_count_relative_noise_median": Var(("noise_frequency",), "Hz-1",
                                             "median over the pixels of the electron-count "
                                             "noise divided by the squared mean count"),
    "flicker_coefficient": Var(("species",), "Hz-1",
                               "K of S = K / (f / 1 Hz)^alpha fitted over the 1/f band"),
    "flicker_coefficient_stderr": Var(("species",), "Hz-1",
                                      "standard error of flicker_coefficient"),
    "flicker_exponent": Var(("species",), "1", "alpha of S = K / f^alpha"),
    "flicker_exponent_stderr": Var(("species",), "1", "standard error of flicker_exponent"),
    "flicker_corner_frequency": Var(("species",), "Hz",
                                    "frequency where K / f^alpha meets a resolved G-R plateau"),
    "current_flicker_coefficient": Var((), "A2 Hz-1",
                                       "K of the current's S = K / (f / 1 Hz)^alpha"),
    "current_flicker_coefficient_stderr": Var((), "A2 Hz-1",
                                              "standard error of current_flicker_coefficient"),
    "current_flicker_exponent": Var((), "1", "alpha of the current's S = K / f^alpha"),
    "current_flicker_exponent_stderr": Var((), "1",
                                           "standard error of current_flicker_exponent"),
    "current_flicker_corner_frequency": Var((), "Hz",
                                            "frequency where the current's K / f^alpha meets "
                                            "its white level or G-R plateau"),
}


def register(name: str, var: Var) -> None:
    """Add a variable to the registry (for extensions; names must be new)."""
    if name in VARIABLES or name in COORDINATES:
        raise ValueError(f"variable {name!r} is registered already")
    VARIABLES[name] = var


def _spec(name: str) -> Var | None:
    return VARIABLES.get(name) or COORDINATES.get(name)


def finish(ds: xr.Dataset, *, title: str, scenario_toml: str, command: str | None = None,
           **attrs) -> xr.Dataset:
    """Attach units, long names, cell methods and the CF global attributes.

    Parameters
    ----------
    ds : xarray.Dataset  Variables named as in :data:`VARIABLES`
    title : str  Scenario title
    scenario_toml : str  The scenario text as run
    command : str, optional  Command line for ``history`` (default: ``sys.argv``)
    **attrs : further global attributes (``seed``, ``trajectories``, ``volume_cm3``...)

    Returns
    -------
    xarray.Dataset  (a new object)
    """
    ds = ds.copy()
    for name in list(ds.variables):
        spec = _spec(str(name))
        if spec is None:
            continue
        var = ds[name]
        var.attrs["units"] = spec.units
        var.attrs["long_name"] = spec.long_name
        if spec.cell_methods and name in ds.data_vars:
            var.attrs["cell_methods"] = spec.cell_methods
    for name in ds.coords:
        ds[name].encoding["_FillValue"] = None
    for name in ds.data_vars:
        if ds[name].dtype.kind in "iu":
            ds[name].encoding["_FillValue"] = None
        elif ds[name].dtype.kind == "f":
            ds[name].encoding["_FillValue"] = FILL_VALUE
    now = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    if command is None:
        command = " ".join(["grmc", *sys.argv[1:]]) if sys.argv else "grmc"
    ds.attrs.update(
        {
            "Conventions": "CF-1.11",
            "title": title,
            "source": f"grmc {__version__}",
            "history": f"{now} {command}",
            "scenario_toml": scenario_toml,
        }
    )
    ds.attrs.update({k: v for k, v in attrs.items() if v is not None})
    return ds


def validate(ds: xr.Dataset, *, required: tuple[str, ...] = ()) -> None:
    """Check a Dataset against the registry.

    Raises
    ------
    OutputError
        A required variable is missing, or a registered one has other dims or units.
    """
    for name in required:
        if name not in ds.variables:
            raise OutputError(f"output variable {name!r} is missing")
    for name in ds.variables:
        spec = _spec(str(name))
        if spec is None:
            continue
        var = ds[name]
        if name not in ("sweep",) and "sweep" in var.dims:
            dims = tuple(d for d in var.dims if d != "sweep")
        else:
            dims = var.dims
        if tuple(dims) != spec.dims and name in VARIABLES:
            raise OutputError(f"variable {name!r} has dims {var.dims}, expected {spec.dims}")
        if var.attrs.get("units") != spec.units:
            raise OutputError(f"variable {name!r} has units {var.attrs.get('units')!r}, "
                              f"expected {spec.units!r}")
    for key in ("Conventions", "title", "source", "history"):
        if key not in ds.attrs:
            raise OutputError(f"global attribute {key!r} is missing")


def save(ds: xr.Dataset, path: str | Path, *, required: tuple[str, ...] = ()) -> Path:
    """Validate, then write NetCDF-4 atomically (temporary file + rename).

    Returns
    -------
    Path  The file written.
    """
    validate(ds, required=required)
    path = Path(path)
    with atomic_target(path) as tmp:
        ds.to_netcdf(tmp, format="NETCDF4", engine="netcdf4")
    return path


def load(path: str | Path) -> xr.Dataset:
    """Open a grmc output file (fully loaded into memory, file closed) and validate it."""
    import xarray as xr

    with xr.open_dataset(path, engine="netcdf4") as ds:
        ds = ds.load()
    validate(ds)
    return ds
