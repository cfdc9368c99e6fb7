"""Noise spectra for circuit work: CSV tables, Verilog-A noise sources, SPICE subcircuits.

From an output Dataset (docs/file-format.md) this module writes

* a CSV table of one spectrum (the readout current, or the count of one species) with its
  95 % interval, the linear-noise line and the exported curve over the whole band, each row
  marked ``simulated`` or ``extended``, under a ``#`` header that says what it is;
* a Verilog-A module with a current noise source ``I(p, n) <+ noise_table(...)`` whose
  table is the exported curve at about 20 points per decade over the band, plus the same
  table as a plain two-column file ``<stem>.tbl``;
* a SPICE ``.subckt NAME p n`` made of resistors, capacitors and controlled sources whose
  noise current has the exported spectrum (:mod:`grmc.spice`).

The exported curve, its source (``fit``, ``lna``, ``mc``) and band are chosen in
:mod:`grmc.export_curve` (docs/circuit-export.md).  Every file is written to a temporary
name in the target directory and then renamed, so a failed export never leaves a partial
file where a good one is expected.

Public API
----------
export_csv(ds, path, *, quantity=None, source=None, band=(1, 1e11)) -> Path
export_verilog_a(ds, path, *, quantity=None, interpolation="linear", module_name=None,
                 source=None, band=(1, 1e11), table="inline", points_per_decade=20)
                 -> tuple[Path, Path]
export_spice(ds, path, *, quantity=None, source=None, band=(1, 1e11), name=None) -> Path
read_noise_table(path) -> (f, S)
spectrum_table(ds, quantity=None) -> SpectrumTable
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path
from typing import Any, Literal

import numpy as np

from .atomic import write_text_atomic
from .export_curve import (DEFAULT_BAND_HZ, ExportCurve, ExportOptionError, export_curve,
                           lna_theory)
from .rational import RationalSpectrum, positive_fit
from .result import Result, Spectrum, as_result
from .spice import spice_name, subcircuit

__all__ = [
    "SpectrumTable",
    "export_csv",
    "export_spice",
    "export_verilog_a",
    "read_noise_table",
    "resample_spectrum",
    "spectrum_table",
]

#: printf format of every number written: 11 significant digits, enough to round-trip
#: the spectra (whose statistical error is far larger) and exact for the frequency grid.
NUMBER_FORMAT = "%.10e"

_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_$]*$")
_NUMBER = re.compile(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
# a few Verilog-AMS keywords a file stem could plausibly collide with
_KEYWORDS = {
    "module", "endmodule", "analog", "begin", "end", "input", "output", "inout",
    "electrical", "real", "integer", "parameter", "if", "else", "for", "while", "case",
    "function", "discipline", "nature", "branch", "table", "noise_table", "initial",
}


# --------------------------------------------------------------------------------------------
# What to export
# --------------------------------------------------------------------------------------------
#: One spectrum of a file with its interval and theory line (the result layer's
#: :class:`grmc.result.Spectrum`).
SpectrumTable = Spectrum


def spectrum_table(ds: Any, quantity: str | None = None) -> SpectrumTable:
    """Take one spectrum with its interval out of an output file.

    Parameters
    ----------
    ds : xarray.Dataset, Result or path  Output file contents (docs/file-format.md)
    quantity : str, optional  "current" (needs ``current_psd``) or a species name; default
        "current" where the file has ``current_psd``, else "electrons"

    Returns
    -------
    SpectrumTable  The spectrum read by :meth:`grmc.result.Result.spectrum`, with the
        nominal linear-noise line (the one the scenario text recomputes beyond the band)

    Raises
    ------
    ValueError  for an unknown quantity, or a Dataset with more dimensions than
        (species, frequency) (select a sweep point first).

    Notes
    -----
    The current's interval is read from ``current_psd_low`` / ``current_psd_high`` where the
    file has them.  Otherwise it is made from the count intervals: every spectrum in the
    file is an average of the same K periodogram values, so the relative 95 % interval
    nu / chi2.ppf(., nu), nu = 2K, is the same for all of them (Welch 1967).
    """
    return as_result(ds).spectrum(quantity, pixel_lna=False)


# --------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------
def _atomic_write(path: Path, text: str) -> None:
    """Write text to a temporary file next to path, then rename it over path."""
    write_text_atomic(path, text)


def _fmt(x: float) -> str:
    return NUMBER_FORMAT % x


def _header_lines(res: Result, tab: SpectrumTable) -> list[str]:
    what = res.current_definition if tab.is_current else f"number of {tab.quantity} in the volume"
    lines = [
        "grmc noise spectrum",
        f"scenario: {res.title or 'untitled scenario'}",
        f"quantity: {tab.quantity} -- {what}",
        f"units: frequency in Hz; spectral densities in {tab.units}",
        "one-sided power spectral density: its integral over f > 0 is the variance",
    ]
    if res.bias_V is not None:
        lines.append(f"readout bias: {res.bias_V:g} V")
    if tab.is_current and res.current_mean_A is not None:
        lines.append(f"mean current: {res.current_mean_A:.6e} A")
    return lines


def _band_noise_lines(res: Result, tab: SpectrumTable) -> list[str]:
    """The file's rms noise current over the readout band, where it has one."""
    bn = res.band_noise() if tab.is_current else None
    if bn is None:
        return []
    where = (f"{bn.band[0]:g} .. {bn.band[1]:g} Hz" if bn.band is not None
             else "the readout band")
    text = f"rms noise current over the readout band {where}: "
    text += f"{bn.rms:.6e} A" if math.isfinite(bn.rms) else "not resolved by the run"
    if bn.low is not None and math.isfinite(bn.rms):
        text += f" (95 % interval {bn.low:.4e} .. {bn.high:.4e} A)"
    if bn.lna is not None:
        text += f"; linear noise {bn.lna:.6e} A"
    return [text]


def _curve_lines(res: Result, tab: SpectrumTable, cur: ExportCurve) -> list[str]:
    """Header lines every circuit export shares: source, band, deviation, band noise."""
    lines = [
        f"source: {cur.source} -- {cur.how}",
        f"band: {cur.band[0]:g} .. {cur.band[1]:g} Hz; simulated band {cur.simulated[0]:.6g} "
        f".. {cur.simulated[1]:.6g} Hz",
        cur.deviation_text(),
    ]
    return lines + _band_noise_lines(res, tab)


def _prepare(ds: Any, quantity: str | None, source: str | None, band: tuple[float, float],
             current_for: str = "") -> tuple[Result, SpectrumTable, ExportCurve]:
    """The file read once, its spectrum and the exported curve; ``current_for`` names a
    format that needs a current (refused for a count first)."""
    res = as_result(ds)
    tab = res.spectrum(quantity, pixel_lna=False)
    if current_for and not tab.is_current:
        raise ExportOptionError(
            "--quantity", f"{tab.quantity!r} is a count spectrum [counts^2/Hz], not a current: "
            f"a {current_for} noise source needs A^2/Hz (add a [readout] to the scenario), or "
            "export the counts as CSV")
    return res, tab, export_curve(res, tab, source=source, band=band)


def _csv_rows(tab: SpectrumTable, cur: ExportCurve, points_per_decade: int):
    """Frequencies of the CSV: the file's own inside the band, a log grid outside the
    simulated band; and whether each row is simulated."""
    lo, hi = cur.band[0] * (1 - 1e-12), cur.band[1] * (1 + 1e-12)  # rounding of f = j/T
    f_file = tab.frequency[(tab.frequency >= lo) & (tab.frequency <= hi)]
    grid = _log_grid(cur.band[0], cur.band[1], points_per_decade)
    f_ext = grid[~cur.is_simulated(grid)]
    f = np.concatenate([f_file, f_ext])
    simulated = np.concatenate([np.ones(f_file.size, bool), np.zeros(f_ext.size, bool)])
    order = np.argsort(f, kind="stable")
    return f[order], simulated[order]


def export_csv(ds: Any, path: str | os.PathLike[str], *, quantity: str | None = None,
               source: Literal["fit", "lna", "mc"] | None = None,
               band: tuple[float, float] = DEFAULT_BAND_HZ,
               points_per_decade: int = 20) -> Path:
    """Write one spectrum with its interval, and the exported curve over the band, as CSV.

    Parameters
    ----------
    ds : xarray.Dataset, Result or path  Output file contents
    path : path  CSV file to write
    quantity : str, optional  "current" or a species name (see :func:`spectrum_table`)
    source : "fit" | "lna" | "mc", optional  The curve in ``psd_export`` (see
        :func:`grmc.export_curve.export_curve`; default fit where it passed, else lna)
    band : (f1, f2)  Band of the table [Hz]
    points_per_decade : int  Density of the rows outside the simulated band [1]

    Returns
    -------
    Path  The file written

    Notes
    -----
    Columns ``frequency_Hz, psd, psd_low, psd_high`` (the file's estimate and its 95 %
    interval; nan on extended rows), ``psd_lna`` (the file's linear-noise spectrum; on
    extended rows recomputed from the scenario where possible), ``psd_export`` (the chosen
    source over the whole band) and ``region`` (``simulated`` or ``extended``); ``#`` comment
    lines first (scenario title, quantity, units, one-sidedness, how the interval was made,
    the source, the band, the largest deviation from the Monte Carlo estimate, the rms noise
    in the readout band).  Readable with ``pandas.read_csv(path, comment="#")``.
    """
    res, tab, cur = _prepare(ds, quantity, source, band)
    path = Path(path)
    f, simulated = _csv_rows(tab, cur, points_per_decade)
    idx = np.clip(np.searchsorted(tab.frequency, f), 0, tab.frequency.size - 1)
    nan = np.full(f.size, np.nan)
    cols = {"frequency_Hz": f,
            "psd": np.where(simulated, tab.psd[idx], nan),
            "psd_low": np.where(simulated, tab.psd_low[idx], nan),
            "psd_high": np.where(simulated, tab.psd_high[idx], nan)}
    theory = lna_theory(res, tab.quantity)
    if tab.psd_lna is not None or theory is not None:
        lna = np.where(simulated, tab.psd_lna[idx], nan) if tab.psd_lna is not None else nan
        if theory is not None and np.any(~simulated):
            lna = np.where(simulated, lna, theory[0](np.where(simulated, cur.band[0], f)))
        cols["psd_lna"] = lna
    cols["psd_export"] = cur(f)
    head = (_header_lines(res, tab) + [f"interval: {tab.interval_note}"]
            + _curve_lines(res, tab, cur))
    if "psd_lna" in cols:
        head.append("psd_lna: linear-noise approximation (van Kampen's system-size expansion)")
    head.append("psd: exact spectrum of the master equation (finite state projection)"
                if tab.exact else "psd: Monte Carlo estimate of the continuous-time spectrum, "
                "corrected for sampling (bin averaging, aliasing)")
    head.append("psd_export: the exported curve (source above); region: simulated = a "
                "frequency of the file, extended = outside the simulated band")
    out = ["# " + h for h in head]
    out.append(",".join([*cols, "region"]))
    data = np.column_stack(list(cols.values()))
    for row, sim in zip(data, simulated):
        vals = ["nan" if not np.isfinite(v) else _fmt(v) for v in row]
        out.append(",".join([*vals, "simulated" if sim else "extended"]))
    _atomic_write(path, "\n".join(out) + "\n")
    return path


def _log_grid(f_lo: float, f_hi: float, points_per_decade: int) -> np.ndarray:
    """Logarithmic grid from f_lo to f_hi (both exact), at least points_per_decade."""
    if points_per_decade < 1:
        raise ValueError(f"points_per_decade must be >= 1, got {points_per_decade!r}")
    lo, hi = math.log10(f_lo), math.log10(f_hi)
    n = max(2, math.ceil((hi - lo) * points_per_decade) + 1)
    grid = np.logspace(lo, hi, n)
    grid[0], grid[-1] = f_lo, f_hi
    return grid


def resample_spectrum(
    freqs: np.ndarray,
    psd: np.ndarray,
    *,
    points_per_decade: int = 20,
    smooth: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """Resample a positive spectrum onto a logarithmic grid spanning its band.

    Parameters
    ----------
    freqs : array  Ascending frequencies [Hz]
    psd : array  Spectrum [unit^2/Hz]
    points_per_decade : int  Grid density [1]
    smooth : bool  Average the values inside each grid point's band (width one grid step
        in log f) before interpolating -- for a noisy estimate; False interpolates the given
        values (for a smooth curve)

    Returns
    -------
    f, S : ndarray  Grid from min(freqs) to max(freqs), ascending, unique, > 0 [Hz], and the
        spectrum on it, interpolated linearly in log f - log S [unit^2/Hz]
    """
    f = np.asarray(freqs, dtype=float)
    s = np.asarray(psd, dtype=float)
    good = np.isfinite(f) & np.isfinite(s) & (f > 0) & (s > 0)
    f, s = f[good], s[good]
    if f.size < 2:
        raise ValueError("fewer than two positive spectrum values to tabulate")
    order = np.argsort(f)
    f, s = f[order], s[order]
    grid = _log_grid(f[0], f[-1], points_per_decade)
    lo, hi = math.log10(f[0]), math.log10(f[-1])
    n = grid.size
    if smooth:
        half = 0.5 / points_per_decade
        edges = np.concatenate([[lo - half], 0.5 * (np.log10(grid[1:]) + np.log10(grid[:-1])),
                                [hi + half]])
        idx = np.searchsorted(edges, np.log10(f), side="right") - 1
        counts = np.bincount(idx, minlength=n)
        s_sum = np.bincount(idx, weights=s, minlength=n)
        lf_sum = np.bincount(idx, weights=np.log10(f), minlength=n)
        keep = counts > 0
        xp = lf_sum[keep] / counts[keep]
        yp = np.log10(s_sum[keep] / counts[keep])
    else:
        xp, yp = np.log10(f), np.log10(s)
    x = np.log10(grid)
    y = np.interp(x, xp, yp)
    if xp.size >= 2:  # the end bands are one-sided: extend the end slopes, do not clamp
        lo_side, hi_side = x < xp[0], x > xp[-1]
        y[lo_side] = yp[0] + (x[lo_side] - xp[0]) * (yp[1] - yp[0]) / (xp[1] - xp[0])
        y[hi_side] = yp[-1] + (x[hi_side] - xp[-1]) * (yp[-1] - yp[-2]) / (xp[-1] - xp[-2])
    return grid, 10.0**y


def _module_name(name: str | None, stem: str) -> str:
    if name is not None:
        if not _IDENTIFIER.match(name) or name in _KEYWORDS:
            raise ValueError(f"module_name {name!r} is not a Verilog-A identifier")
        return name
    cand = re.sub(r"[^A-Za-z0-9_]", "_", stem)
    if not _IDENTIFIER.match(cand) or cand in _KEYWORDS:
        cand = "grmc_" + cand
    return cand


def _verilog_module(name: str, func: str, head: list[str], f: np.ndarray, s: np.ndarray,
                    table: str, tbl_name: str) -> str:
    va = ["// " + h for h in head]
    va += [
        "// A noise-only element: connect it across the node whose current noise it models.",
        "",
        '`include "disciplines.vams"',
        "",
        f"module {name}(p, n);",
        "    inout p, n;",
        "    electrical p, n;",
        "    analog begin",
    ]
    label = f'"{name}"'
    if table == "file":
        va.append(f'        I(p, n) <+ {func}("{tbl_name}", {label});')
    else:
        va.append(f"        I(p, n) <+ {func}('{{")
        va.append(",\n".join(f"            {_fmt(a)}, {_fmt(b)}" for a, b in zip(f, s)))
        va.append(f"        }}, {label});")
    va += ["    end", "endmodule", ""]
    return "\n".join(va)


def export_verilog_a(
    ds: Any,
    path: str | os.PathLike[str],
    *,
    quantity: str | None = None,
    interpolation: Literal["linear", "log"] = "linear",
    module_name: str | None = None,
    source: Literal["mc", "fit", "lna"] | None = None,
    band: tuple[float, float] = DEFAULT_BAND_HZ,
    table: Literal["inline", "file"] = "inline",
    points_per_decade: int = 20,
) -> tuple[Path, Path]:
    """Write a Verilog-A current noise source with the tabulated current spectrum.

    Parameters
    ----------
    ds : xarray.Dataset, Result or path  Output file contents (needs ``current_psd``)
    path : path  The ``.va`` file; the table goes to ``<stem>.tbl`` next to it
    quantity : str, optional  Must be "current" (the default where the file has it)
    interpolation : "linear" | "log"  ``noise_table`` (LRM 2.4 section 4.6.4.3: linear in
        f and S) or ``noise_table_log`` (section 4.6.4.4: linear in log f, log S)
    module_name : str, optional  Default: the file stem, made a legal identifier
    source : "fit" | "lna" | "mc", optional  The curve tabulated (see
        :func:`grmc.export_curve.export_curve`; default fit where it passed, else lna)
    band : (f1, f2)  Band of the table [Hz]
    table : "inline" | "file"  The table as an array literal in the module, or the file form
        ``noise_table("<stem>.tbl", "name")`` (most portable; the simulator resolves the
        name relative to its working directory)
    points_per_decade : int  Table density (about 20: noise_table interpolates linearly
        between points) [1]

    Returns
    -------
    (va_path, tbl_path) : Path, Path

    Raises
    ------
    ValueError  for a count quantity (a count spectrum is not a current), a file without
        ``current_psd``, a source the file cannot give or a band it cannot support
        (:class:`grmc.export_curve.ExportOptionError`).

    Notes
    -----
    The module is a noise-only two-terminal element: ``I(p, n) <+ noise_table(...)`` with
    (frequency [Hz], one-sided PSD [A^2/Hz]) pairs, ascending, unique, > 0, spanning the
    band.  It adds no DC current.  The array literal is the LRM 2.4 form
    ``'{f1, S1, f2, S2, ...}``; older tools want ``{...}`` -- or use ``table="file"``.
    """
    if interpolation not in ("linear", "log"):
        raise ValueError(f"interpolation must be 'linear' or 'log', got {interpolation!r}")
    if table not in ("inline", "file"):
        raise ValueError(f"table must be 'inline' or 'file', got {table!r}")
    va_path = Path(path)
    if va_path.suffix == ".tbl":
        raise ValueError("give the .va file name; the .tbl is written next to it")
    name = _module_name(module_name, va_path.stem)
    res, tab, cur = _prepare(ds, quantity, source, band, current_for="Verilog-A")
    tbl_path = va_path.with_suffix(".tbl")
    f = _log_grid(cur.band[0], cur.band[1], points_per_decade)
    s = cur(f)
    if not (np.all(np.diff(f) > 0) and np.all(f > 0) and np.all(np.isfinite(s))
            and np.all(s >= 0)):
        raise ValueError("internal: the table is not ascending, unique, finite and >= 0")
    func = "noise_table" if interpolation == "linear" else "noise_table_log"
    head = _header_lines(res, tab) + _curve_lines(res, tab, cur) + [
        f"table: {f.size} (frequency [Hz], PSD [A^2/Hz]) pairs, {f[0]:.6g} .. {f[-1]:.6g} Hz",
        f"interpolation in the simulator: {func} (Accellera Verilog-AMS LRM 2.4, section "
        + ("4.6.4.3, linear)" if func == "noise_table" else "4.6.4.4, log-log)"),
    ]
    tbl = ["# " + h for h in head] + ["# frequency_Hz  psd_A2_per_Hz"]
    tbl += [f"{_fmt(a)} {_fmt(b)}" for a, b in zip(f, s)]
    _atomic_write(tbl_path, "\n".join(tbl) + "\n")
    _atomic_write(va_path, _verilog_module(name, func, head, f, s, table, tbl_path.name))
    return va_path, tbl_path


def _rational_for_spice(cur: ExportCurve) -> tuple[RationalSpectrum, str]:
    """The exported curve as white + Lorentzians, and a note on how it was made."""
    if cur.rational is not None:
        return cur.rational, "exact: the curve is itself white + Lorentzians"
    if cur.source == "lna":
        raise ExportOptionError("--source", "the linear-noise spectrum of this file is not a "
                                "sum of Lorentzians (see above); use --source fit or mc")
    f = _log_grid(cur.band[0], cur.band[1], 10)
    spec = positive_fit(f, cur(f))
    dev = float(np.max(np.abs(spec(f) / cur(f) - 1.0)))
    return spec, (f"white + {spec.corners.size} Lorentzians with plateaus >= 0 fitted to the "
                  f"curve by non-negative least squares; largest deviation from the curve over "
                  f"the band {100 * dev:.3g} %")


def export_spice(
    ds: Any,
    path: str | os.PathLike[str],
    *,
    quantity: str | None = None,
    source: Literal["fit", "lna", "mc"] | None = None,
    band: tuple[float, float] = DEFAULT_BAND_HZ,
    name: str | None = None,
) -> Path:
    """Write a SPICE noise subcircuit ``.subckt NAME p n`` with the current spectrum.

    Parameters
    ----------
    ds : xarray.Dataset, Result or path  Output file contents (needs ``current_psd``)
    path : path  Netlist file to write (e.g. ``pixel_noise.cir``; ``.include`` it)
    quantity : str, optional  Must be "current"
    source : "fit" | "lna" | "mc", optional  As for :func:`export_verilog_a`; ``mc`` is
        represented by white + Lorentzians with plateaus >= 0 fitted to the curve
    band : (f1, f2)  Band the header states and the deviations are measured over [Hz]
    name : str, optional  Subcircuit name; default the file stem made an identifier

    Returns
    -------
    Path

    Raises
    ------
    ValueError  as :func:`export_verilog_a`.

    Notes
    -----
    The circuit (:func:`grmc.spice.subcircuit`) reproduces its rational spectrum at every
    frequency, so it also holds the tails beyond the band.  The header says the source, the
    fit or theory, the band, the scenario title, the deviations and ``* subckt: NAME``.
    """
    path = Path(path)
    name = spice_name(name if name is not None else path.stem)
    res, tab, cur = _prepare(ds, quantity, source, band, current_for="SPICE")
    spec, note = _rational_for_spice(cur)
    head = _header_lines(res, tab) + _curve_lines(res, tab, cur) + [
        f"circuit spectrum: {spec.describe()} [A^2/Hz]",
        f"circuit spectrum against the curve: {note}",
        "use: X1 node_p node_n " + name + " (a noise current between two nodes; a .noise "
        "analysis sees it, a DC or transient analysis does not)",
    ]
    _atomic_write(path, subcircuit(spec, name, head))
    return path


# --------------------------------------------------------------------------------------------
# Reading back
# --------------------------------------------------------------------------------------------
def _pairs(numbers: list[float], where: Path) -> tuple[np.ndarray, np.ndarray]:
    if len(numbers) % 2:
        raise ValueError(f"{where}: odd number of values in the noise table")
    a = np.asarray(numbers, dtype=float).reshape(-1, 2)
    return a[:, 0], a[:, 1]


def read_noise_table(path: str | os.PathLike[str]) -> tuple[np.ndarray, np.ndarray]:
    """Parse a noise table: a ``.tbl`` file, or the table of a ``.va`` module.

    Parameters
    ----------
    path : path  A two-column file (``#`` comments, one ``frequency power`` pair per line),
        or a Verilog-A file whose ``noise_table`` / ``noise_table_log`` call holds an array
        literal (``'{...}`` or ``{...}``) or names a table file (read relative to the
        ``.va`` file's directory)

    Returns
    -------
    f, S : ndarray  Frequencies [Hz] and one-sided PSD [A^2/Hz]

    Raises
    ------
    ValueError  when no table is found or the values do not pair up.
    """
    path = Path(path)
    text = path.read_text(encoding="utf-8")
    if path.suffix.lower() in (".va", ".vams", ".v"):
        code = re.sub(r"//[^\n]*", "", text)
        code = re.sub(r"/\*.*?\*/", "", code, flags=re.DOTALL)
        m = re.search(r"noise_table(?:_log)?\s*\(\s*", code)
        if m is None:
            raise ValueError(f"{path}: no noise_table call")
        rest = code[m.end():]
        if rest.startswith('"'):
            fname = rest[1:rest.index('"', 1)]
            return read_noise_table(path.parent / fname)
        rest = rest.lstrip("'")
        if not rest.startswith("{"):
            raise ValueError(f"{path}: noise_table argument is neither a file nor an array")
        body = rest[1:rest.index("}")]
        return _pairs([float(x) for x in _NUMBER.findall(body)], path)
    numbers: list[float] = []
    for line in text.splitlines():
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        vals = line.replace(",", " ").split()
        if len(vals) != 2:
            raise ValueError(f"{path}: expected 'frequency power' per line, got {line!r}")
        numbers.extend(float(v) for v in vals)
    return _pairs(numbers, path)
