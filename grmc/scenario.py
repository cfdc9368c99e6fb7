"""Scenario files: TOML text -> frozen, validated dataclasses.

Every key of the scenario format (see the README, "Scenario files") is declared once in the
``_SCHEMA`` tables below with its type, range and default.  Every error raised here is a
:class:`ScenarioError` whose message names the file, the section and the key, so that the
command line can print one clear line and exit with status 2.

Units are in the key names: densities [cm^-3], areas [cm^2], times [s], energies [eV].
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from . import materials as _materials
from .materials import MaterialError, MaterialRecord

__all__ = [
    "ScenarioError",
    "Material",
    "Volume",
    "Trap",
    "Light",
    "Start",
    "RunSettings",
    "Readout",
    "Reservoir",
    "Scenario",
    "check_counts",
    "load_scenario",
    "parse_scenario",
    "set_key",
]


class ScenarioError(ValueError):
    """A scenario file (or a value given for one of its keys) is not valid.

    Parameters
    ----------
    source : str
        File name (or ``"<string>"``) the scenario came from.
    section : str
        TOML section, e.g. ``"material"`` or ``"traps.deep"``; empty for top-level keys.
    key : str
        The offending key; empty when the whole file is at fault.
    message : str
        What is wrong, in plain words.
    """

    def __init__(self, source: str, section: str, key: str, message: str):
        self.source = source
        self.section = section
        self.key = key
        self.message = message
        where = ""
        if section and key:
            where = f"[{section}] {key}: "
        elif section:
            where = f"[{section}]: "
        elif key:
            where = f"{key}: "
        super().__init__(f"{source}: {where}{message}")

    def __reduce__(self):
        """Rebuilt from its four parts, so that the error survives pickling (a sweep point
        refused in a Dask worker reaches the command line intact)."""
        return (type(self), (self.source, self.section, self.key, self.message))


# --------------------------------------------------------------------------------------------
# Dataclasses handed to the rest of the program
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Material:
    """Bulk material parameters.

    Attributes
    ----------
    temperature_K : float  Lattice temperature [K]
    intrinsic_density_cm3 : float  Intrinsic carrier density n_i [cm^-3]
    radiative_cm3_s : float  Band-to-band coefficient B [cm^3 s^-1]
    auger_electron_cm6_s : float  Auger coefficient C_n for e + e + h -> e [cm^6 s^-1]
    auger_hole_cm6_s : float  Auger coefficient C_p for e + h + h -> h [cm^6 s^-1]
    donors_cm3 : float  Ionized donor density [cm^-3]
    acceptors_cm3 : float  Ionized acceptor density [cm^-3]
    name : str or None  Library material the values were resolved from (``grmc.materials``)
    composition_x : float or None  Alloy composition x [1]
    record : MaterialRecord or None  Every resolved value with its source (what
        ``grmc check`` prints), with the warnings of laws used outside their range
    """

    temperature_K: float
    intrinsic_density_cm3: float
    radiative_cm3_s: float = 0.0
    auger_electron_cm6_s: float = 0.0
    auger_hole_cm6_s: float = 0.0
    donors_cm3: float = 0.0
    acceptors_cm3: float = 0.0
    name: str | None = None
    composition_x: float | None = None
    record: MaterialRecord | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class Volume:
    """The closed volume.

    Attributes
    ----------
    volume_cm3 : float  Volume V [cm^3]
    surface_area_cm2 : float  Surface area used by ``areal_density_cm2`` traps [cm^2]
    size_nm : tuple of float or None  Box edges when given [nm]
    """

    volume_cm3: float
    surface_area_cm2: float | None
    size_nm: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class Trap:
    """One trap level (Shockley-Read-Hall centre).

    Attributes
    ----------
    label : str  Unique name
    count : int or None  Number of traps in the volume, when given directly
    density_cm3 : float or None  Volume density [cm^-3], when given
    areal_density_cm2 : float or None  Areal density on the surface [cm^-2], when given
    energy_eV : float  E_t - E_i [eV]
    kind : "acceptor" or "donor"  Charge states 0/-1 (acceptor) or +1/0 (donor)
    electron_capture_cm3_s : float  c_n = sigma_n v_th [cm^3 s^-1]
    hole_capture_cm3_s : float  c_p = sigma_p v_th [cm^3 s^-1]
    spread_decades : float  D: capture and emission coefficients of the level's traps are
        scaled together by a factor spread log-uniformly over D decades below the given ones
        (0: every trap as given) [decades]
    sublevels_per_decade : int or None  Sub-levels per decade of that spread (None: the
        model's default, two) [1/decade]
    """

    label: str
    count: int | None
    density_cm3: float | None
    areal_density_cm2: float | None
    energy_eV: float
    kind: Literal["acceptor", "donor"]
    electron_capture_cm3_s: float
    hole_capture_cm3_s: float
    spread_decades: float = 0.0
    sublevels_per_decade: int | None = None


@dataclass(frozen=True)
class Light:
    """Illumination.

    Attributes
    ----------
    generation_cm3_s : float  Mean optical pair generation rate per volume [cm^-3 s^-1]
    waveform : "steady", "off", "sine" or "square"
    modulation_frequency_Hz : float  Drive frequency of a sine or square waveform [Hz]
    modulation_depth : float  m in G(t) = G (1 + m sin(2 pi f t)) (sine) or G (1 +/- m)
        (square, 50 % duty) [1]
    """

    generation_cm3_s: float = 0.0
    waveform: Literal["steady", "off", "sine", "square"] = "steady"
    modulation_frequency_Hz: float = 0.0
    modulation_depth: float = 0.0

    @property
    def modulated(self) -> bool:
        """True for a sine or square waveform."""
        return self.waveform in ("sine", "square")


@dataclass(frozen=True)
class Start:
    """Start of the observation window.

    Attributes
    ----------
    excess_pairs : int  Electron-hole pairs added at t = 0, after settling [count]
    """

    excess_pairs: int = 0


@dataclass(frozen=True)
class Population:
    """Pixel-population analysis (each trajectory is one pixel; useful with
    ``dopants = "poisson"``).

    Attributes
    ----------
    frequencies_Hz : tuple of float  Frequencies at which each pixel's noise is reported [Hz]
    threshold : float or None  Noise level to count pixels above, in the readout quantity's
        PSD units (A^2/Hz with a [readout], else counts^2/Hz) [unit^2/Hz]
    """

    frequencies_Hz: tuple[float, ...] = ()
    threshold: float | None = None


@dataclass(frozen=True)
class RunSettings:
    """Ensemble settings.

    Attributes
    ----------
    trajectories : int  Ensemble size
    duration_s : float  Observation window after settling [s]
    samples : int  Uniform sample points in the window
    settle_s : float  Simulated and discarded before t = 0 [s]
    seed : int  Seed of every random stream
    dopants : "rounded" or "poisson"  How dopant and trap counts are set per trajectory
    accuracy : float, optional  Target relative 95 % half-width; the run goes in rounds
    band_Hz : (float, float), optional  Band the accuracy is asked over [Hz]
    max_seconds : float  Time budget of a run in rounds [s]
    flicker_band_Hz : (float, float) or None  Band of the 1/f fit (default: the inner band
        of the trap levels' spread of time constants) [Hz]
    """

    trajectories: int = 256
    duration_s: float = 1.0e-6
    samples: int = 4096
    settle_s: float = 0.0
    seed: int = 1
    dopants: Literal["rounded", "poisson"] = "rounded"
    accuracy: float | None = None
    band_Hz: tuple[float, float] | None = None
    max_seconds: float = 600.0
    flicker_band_Hz: tuple[float, float] | None = None


@dataclass(frozen=True)
class Readout:
    """A biased photoconductor bar read out as a current.

    Attributes
    ----------
    bias_V : float  Bias across the bar [V]
    length_cm : float  Distance between contacts L [cm]
    electron_mobility_cm2_Vs : float  mu_n [cm^2 V^-1 s^-1]
    hole_mobility_cm2_Vs : float  mu_p [cm^2 V^-1 s^-1]
    collection : "mean" or "events"
        "mean": the current is q bias/L^2 (mu_n N_e + mu_p N_h) of the counts (G-R noise
        only); "events": every transit of a carrier to its collecting contact is an event
        (rate N / t_tr, t_tr = L^2 / (mu bias)) and the current is q times the collection
        events per second, so it carries the shot noise of collection as well.  The ohmic
        contacts keep the volume neutral: a carrier leaving through one contact is replaced
        by one entering through the other, so the counts do not change.
    band_Hz : (float, float) or None  Readout band [f1, f2]: the output gets the rms noise
        current over it (``current_noise_rms``) [Hz]
    """

    bias_V: float
    length_cm: float
    electron_mobility_cm2_Vs: float
    hole_mobility_cm2_Vs: float
    collection: Literal["mean", "events"] = "mean"
    band_Hz: tuple[float, float] | None = None

    def transit_times(self) -> tuple[float, float]:
        """(t_tr,n, t_tr,p) = L^2 / (mu bias) [s]; inf where a mobility or the bias is 0."""
        out = []
        for mu in (self.electron_mobility_cm2_Vs, self.hole_mobility_cm2_Vs):
            rate = mu * abs(self.bias_V) / self.length_cm**2
            out.append(1.0 / rate if rate > 0 else math.inf)
        return out[0], out[1]


@dataclass(frozen=True)
class Reservoir:
    """Exchange of one carrier kind with a neighbouring region held at a given density.

    The volume is open on one side: carriers of ``carrier`` kind leave it (swept out by the
    field, or taken by the junction or contact) at the rate ``N / t_x`` and enter it from the
    neighbouring region at the rate ``density * V / t_x``, with ``t_x`` their exchange time.
    The volume stays neutral through its ohmic contact: when one carrier of this kind enters
    or leaves, the contact supplies or withdraws a carrier of the other kind within the
    dielectric relaxation time (taken as instantaneous), so each exchange moves one
    electron-hole pair.  This needs a volume of definite type (the other kind outnumbers this
    one in every trap configuration); the model refuses others.

    Attributes
    ----------
    carrier : "electrons" or "holes"  The kind exchanged (the volume's minority carrier)
    density_cm3 : float  Its density in the neighbouring region [cm^-3] (at a junction:
        n_i^2 / N in equilibrium, n_i^2 / N exp(q V_j / kT) at the bias V_j; 0 under a
        strong reverse bias: pure collection)
    exchange_time_s : float or None  t_x [s]; None: the kind's transit time of the
        ``[readout]`` (L^2 / (mu bias))
    """

    carrier: Literal["electrons", "holes"]
    density_cm3: float
    exchange_time_s: float | None = None

    def exchange_time(self, readout: Readout | None) -> float:
        """t_x [s]: ``exchange_time_s``, else the kind's transit time of ``readout``."""
        if self.exchange_time_s is not None:
            return self.exchange_time_s
        if readout is None:
            return math.inf
        return readout.transit_times()[1 if self.carrier == "holes" else 0]


@dataclass(frozen=True)
class Scenario:
    """A validated scenario.

    Attributes
    ----------
    title, notes : str
    material, volume, traps, light, start, run, readout, population, reservoir : the sections
    source : str  File name the scenario came from (``"<string>"`` for text)
    text : str  The TOML text as given
    """

    title: str
    material: Material
    volume: Volume
    traps: tuple[Trap, ...] = ()
    light: Light = field(default_factory=Light)
    start: Start = field(default_factory=Start)
    run: RunSettings = field(default_factory=RunSettings)
    readout: Readout | None = None
    population: Population | None = None
    reservoir: Reservoir | None = None
    notes: str = ""
    source: str = "<string>"
    text: str = ""

    @property
    def stem(self) -> str:
        """File stem used for default output names."""
        if self.source.startswith("<"):
            return "scenario"
        return Path(self.source).stem


# --------------------------------------------------------------------------------------------
# The schema: one table per section, one row per key
# --------------------------------------------------------------------------------------------


#: Largest count the event engine holds exactly: it keeps the state in float64 (integers are
#: exact below 2^53; the margin of one bit leaves room for the excess pairs and the changes).
COUNT_MAX = 2**52
#: Largest density accepted [cm^-3]: no solid holds more than about 1e23 atoms per cm^3
#: (common practice), so anything above this is a typing slip, not a material.
DENSITY_MAX = 1.0e24
#: Smallest volume accepted [cm^3]: (0.1 nm)^3, less than one atom.
VOLUME_MIN = 1.0e-24
#: Largest n_i exp(|E_t - E_i| / kT) accepted [cm^-3]: beyond it the emission rates and their
#: products overflow double precision long before any count could follow them.
EMISSION_DENSITY_MAX = 1.0e150


@dataclass(frozen=True)
class _Key:
    kind: str  # "float", "int", "str", "list3", "floatlist", "band"
    required: bool = False
    default: Any = None
    lo: float | None = None  # lower bound
    lo_open: bool = False  # True: value > lo, False: value >= lo
    hi: float | None = None
    choices: tuple[str, ...] = ()
    pattern: str | None = None


_F = lambda **kw: _Key("float", **kw)  # noqa: E731
_I = lambda **kw: _Key("int", **kw)  # noqa: E731
_S = lambda **kw: _Key("str", **kw)  # noqa: E731

_TOP = {"title": _S(required=True), "notes": _S(default="")}
_SECTIONS_ALLOWED = ("material", "volume", "traps", "light", "start", "run", "readout",
                     "population", "reservoir")

_MATERIAL = {
    "temperature_K": _F(required=True, lo=1e-3, hi=1e4),
    "name": _S(choices=_materials.NAMES),
    "composition_x": _F(),
    # required without a name; with one, these override the library value one by one
    "intrinsic_density_cm3": _F(lo=0.0, lo_open=True, hi=DENSITY_MAX),
    "radiative_cm3_s": _F(lo=0.0, hi=1e-3),
    "auger_electron_cm6_s": _F(lo=0.0, hi=1e-15),
    "auger_hole_cm6_s": _F(lo=0.0, hi=1e-15),
    "electron_thermal_velocity_cm_s": _F(lo=0.0, lo_open=True, hi=3e10),
    "hole_thermal_velocity_cm_s": _F(lo=0.0, lo_open=True, hi=3e10),
    "donors_cm3": _F(default=0.0, lo=0.0, hi=DENSITY_MAX),
    "acceptors_cm3": _F(default=0.0, lo=0.0, hi=DENSITY_MAX),
}
#: ``[material]`` keys that are library parameters (the scenario's value wins).
_MATERIAL_OVERRIDES = ("intrinsic_density_cm3", "radiative_cm3_s", "auger_electron_cm6_s",
                       "auger_hole_cm6_s", "electron_thermal_velocity_cm_s",
                       "hole_thermal_velocity_cm_s")
_MOBILITIES = ("electron_mobility_cm2_Vs", "hole_mobility_cm2_Vs")
_VOLUME = {
    "size_nm": _Key("list3", lo=0.0, lo_open=True, hi=1e7),
    "volume_cm3": _F(lo=VOLUME_MIN, hi=1e6),
    "surface_area_cm2": _F(lo=0.0, lo_open=True, hi=1e2),
}
_TRAP = {
    "label": _S(required=True, pattern=r"^[A-Za-z0-9_-]+$"),
    "count": _I(lo=0, hi=COUNT_MAX),
    "density_cm3": _F(lo=0.0, hi=DENSITY_MAX),
    "areal_density_cm2": _F(lo=0.0, hi=1e17),
    "energy_eV": _F(lo=-10.0, hi=10.0),
    "energy_below_conduction_eV": _F(lo=-10.0, hi=10.0),
    "energy_above_valence_eV": _F(lo=-10.0, hi=10.0),
    "kind": _S(default="acceptor", choices=("acceptor", "donor")),
    "electron_capture_cm3_s": _F(lo=0.0, hi=1e-3),
    "hole_capture_cm3_s": _F(lo=0.0, hi=1e-3),
    "electron_cross_section_cm2": _F(lo=0.0, hi=1e-8),
    "hole_cross_section_cm2": _F(lo=0.0, hi=1e-8),
    "thermal_velocity_cm_s": _F(lo=0.0, lo_open=True, hi=3e10),
    "spread_decades": _F(default=0.0, lo=0.0, hi=12.0),
    "sublevels_per_decade": _I(lo=1, hi=20),
}
_LIGHT = {
    "generation_cm3_s": _F(default=0.0, lo=0.0, hi=1e40),
    "waveform": _S(default="steady", choices=("steady", "off", "sine", "square")),
    "modulation_frequency_Hz": _F(default=0.0, lo=0.0, hi=1e15),
    "modulation_depth": _F(default=0.0, lo=0.0),
}
_START = {"excess_pairs": _I(default=0, lo=0, hi=COUNT_MAX)}
_RUN = {
    "trajectories": _I(default=256, lo=1, hi=2**53),
    "duration_s": _F(default=1.0e-6, lo=0.0, lo_open=True),
    "samples": _I(default=4096, lo=16, hi=2**53),
    "settle_s": _F(default=0.0, lo=0.0),
    "seed": _I(default=1, lo=0, hi=2**63 - 1),
    "dopants": _S(default="rounded", choices=("rounded", "poisson")),
    "accuracy": _F(lo=0.0, lo_open=True),
    "band_Hz": _Key("band"),
    "max_seconds": _F(default=600.0, lo=0.0, lo_open=True),
    "flicker_band_Hz": _Key("band"),
}
_POPULATION = {
    "frequencies_Hz": _Key("floatlist", required=True, lo=0.0, lo_open=True, hi=1e15),
    "threshold": _F(lo=0.0, lo_open=True, hi=1e300),
}
_READOUT = {
    "bias_V": _F(required=True, lo=-1e4, hi=1e4),
    "length_cm": _F(required=True, lo=1e-8, hi=1e2),
    "electron_mobility_cm2_Vs": _F(lo=0.0, hi=1e8),  # required without a [material] name
    "hole_mobility_cm2_Vs": _F(lo=0.0, hi=1e8),
    "collection": _S(default="mean", choices=("mean", "events")),
    "band_Hz": _Key("band"),
}
_RESERVOIR = {
    "carrier": _S(required=True, choices=("electrons", "holes")),
    "density_cm3": _F(required=True, lo=0.0, hi=DENSITY_MAX),
    "exchange_time_s": _F(lo=0.0, lo_open=True),
}

#: Every section's keys, by section name; ``traps`` rows apply to each ``[[traps]]`` entry.
SCHEMA: dict[str, dict[str, _Key]] = {
    "material": _MATERIAL,
    "volume": _VOLUME,
    "traps": _TRAP,
    "light": _LIGHT,
    "start": _START,
    "run": _RUN,
    "readout": _READOUT,
    "population": _POPULATION,
    "reservoir": _RESERVOIR,
}


def _hint(key: str, allowed) -> str:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    if close:
        return f" (did you mean '{close[0]}'?)"
    return f" (allowed: {', '.join(sorted(allowed))})"


def _fmt_bound(spec: _Key) -> str:
    if spec.lo is None:
        return ""
    return f"> {spec.lo:g}" if spec.lo_open else f">= {spec.lo:g}"


def _check_range(value: float, spec: _Key, fail) -> None:
    """Lower and upper bound of a number (upper bounds keep every derived quantity finite)."""
    if spec.lo is not None:
        bad = value <= spec.lo if spec.lo_open else value < spec.lo
        if bad:
            fail(f"must be {_fmt_bound(spec)}, got {value!r}")
    if spec.hi is not None and value > spec.hi:
        hi, got = (f"{spec.hi:d}", f"{value:d}") if spec.kind == "int" else (
            f"{spec.hi:g}", f"{value:g}")
        fail(f"must be <= {hi}, got {got} (beyond the range grmc computes in)")


def _check_value(src: str, section: str, key: str, value: Any, spec: _Key) -> Any:
    def fail(msg: str):
        raise ScenarioError(src, section, key, msg)

    if spec.kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            fail(f"expected a number, got {type(value).__name__} {value!r}")
        value = float(value)
        if not math.isfinite(value):
            fail(f"must be finite, got {value!r}")
    elif spec.kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            fail(f"expected an integer, got {type(value).__name__} {value!r}")
    elif spec.kind == "str":
        if not isinstance(value, str):
            fail(f"expected a string, got {type(value).__name__} {value!r}")
        if spec.choices and value not in spec.choices:
            fail(f"must be one of {', '.join(repr(c) for c in spec.choices)}, got {value!r}")
        if spec.pattern and not re.match(spec.pattern, value):
            fail(f"{value!r} may hold only letters, digits, '_' and '-'")
        return value
    elif spec.kind == "floatlist":
        if not isinstance(value, list) or not value:
            fail(f"expected a non-empty list of numbers, got {value!r}")
        out = []
        for v in value:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                fail(f"expected numbers, got {v!r}")
            if v <= 0:
                fail(f"every value must be > 0, got {v!r}")
            _check_range(float(v), spec, fail)
            out.append(float(v))
        return tuple(sorted(out))
    elif spec.kind == "band":
        return check_band(value, fail)
    elif spec.kind == "list3":
        if not isinstance(value, list) or len(value) != 3:
            fail(f"expected a list of three edge lengths, got {value!r}")
        out = []
        for v in value:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                fail(f"expected numbers, got {v!r}")
            if v <= 0:
                fail(f"every edge must be > 0, got {v!r}")
            _check_range(float(v), spec, fail)
            out.append(float(v))
        return tuple(out)
    _check_range(value, spec, fail)
    if key == "accuracy" and value >= 1.0:
        fail(f"must be < 1 (a relative half-width, e.g. 0.05), got {value!r}")
    return value


def check_band(value: Any, fail) -> tuple[float, float]:
    """A frequency band [f1, f2] with 0 < f1 < f2 [Hz]; ``fail(message)`` raises."""
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        fail(f"expected [f1, f2] in Hz, got {value!r}")
    for v in value:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            fail(f"expected numbers, got {v!r}")
    f1, f2 = float(value[0]), float(value[1])
    if f1 <= 0:
        fail(f"f1 must be > 0, got {f1!r}")
    if f1 >= f2:
        fail(f"f1 must be below f2, got [{f1!r}, {f2!r}]")
    return f1, f2


def _read_table(src: str, section: str, table: Any, schema: dict[str, _Key]) -> dict[str, Any]:
    """Check one table against its schema; return key -> value with defaults filled in."""
    if not isinstance(table, dict):
        raise ScenarioError(src, section, "", "expected a table")
    for key in table:
        if key not in schema:
            raise ScenarioError(src, section, key, "unknown key" + _hint(key, schema))
    out: dict[str, Any] = {}
    for key, spec in schema.items():
        if key in table:
            out[key] = _check_value(src, section, key, table[key], spec)
        elif spec.required:
            raise ScenarioError(src, section, key, "missing required key")
        else:
            out[key] = spec.default
    return out


def _exactly_one(src, section, vals: dict, keys: tuple[str, ...], *, required=True) -> str | None:
    given = [k for k in keys if vals.get(k) is not None]
    if len(given) > 1:
        raise ScenarioError(
            src, section, given[1], f"give exactly one of {' / '.join(keys)}, not both "
            f"{given[0]} and {given[1]}"
        )
    if not given:
        if required:
            raise ScenarioError(src, section, keys[0], f"give one of {' / '.join(keys)}")
        return None
    return given[0]


def _box_surface_cm2(size_nm: tuple[float, float, float]) -> float:
    a, b, c = (x * 1e-7 for x in size_nm)
    return 2.0 * (a * b + b * c + a * c)


def _parse_volume(src: str, table: Any) -> Volume:
    vals = _read_table(src, "volume", table, _VOLUME)
    which = _exactly_one(src, "volume", vals, ("size_nm", "volume_cm3"))
    if which == "size_nm":
        a, b, c = vals["size_nm"]
        vol = a * b * c * 1e-21
        area = vals["surface_area_cm2"] or _box_surface_cm2(vals["size_nm"])
        return Volume(volume_cm3=vol, surface_area_cm2=area, size_nm=vals["size_nm"])
    return Volume(volume_cm3=vals["volume_cm3"], surface_area_cm2=vals["surface_area_cm2"])


def _parse_material(src: str, table: Any, readout: dict | None) -> Material:
    """``[material]``: the scenario's values, the library's where a name is given.

    ``readout`` holds the ``[readout]`` keys (or None): its mobilities are overrides too.
    """
    vals = _read_table(src, "material", table, _MATERIAL)
    name = vals["name"]
    if name is None and vals["intrinsic_density_cm3"] is None:
        raise ScenarioError(src, "material", "intrinsic_density_cm3",
                            "missing required key (or give a library material: name = "
                            f"{' | '.join(repr(n) for n in _materials.NAMES)})")
    overrides = {k: vals[k] for k in _MATERIAL_OVERRIDES}
    if readout is not None:
        overrides.update({k: readout[k] for k in _MOBILITIES})
    band = ("radiative_cm3_s", "auger_electron_cm6_s", "auger_hole_cm6_s")
    try:
        record = _materials.resolve(vals["temperature_K"], name=name,
                                    composition_x=vals["composition_x"], overrides=overrides,
                                    defaults={k: 0.0 for k in band})
    except MaterialError as exc:
        raise ScenarioError(src, "material", exc.key, exc.message) from None
    if readout is None:  # no readout uses the mobilities: no warnings about them
        record = record.unused(_MOBILITIES)
    return Material(
        temperature_K=vals["temperature_K"],
        intrinsic_density_cm3=record.value("intrinsic_density_cm3"),
        radiative_cm3_s=record.value("radiative_cm3_s"),
        auger_electron_cm6_s=record.value("auger_electron_cm6_s"),
        auger_hole_cm6_s=record.value("auger_hole_cm6_s"),
        donors_cm3=vals["donors_cm3"],
        acceptors_cm3=vals["acceptors_cm3"],
        name=name,
        composition_x=record.composition_x,
        record=record,
    )


def _parse_readout(src: str, vals: dict, material: Material) -> Readout:
    """``[readout]`` with the mobilities the material resolved where the keys are absent."""
    vals = dict(vals)
    for key in _MOBILITIES:
        if vals[key] is None:
            vals[key] = material.record.value(key)
        if vals[key] is None:
            why = (f"the library has no {key.split('_')[0]} mobility of {material.name}; "
                   if material.name else "")
            raise ScenarioError(src, "readout", key, f"missing required key ({why}give it)")
    return Readout(**vals)


_ENERGY_KEYS = ("energy_eV", "energy_below_conduction_eV", "energy_above_valence_eV")


def _trap_energy(src: str, section: str, vals: dict, material: Material) -> float:
    """E_t - E_i [eV] from whichever of the three energy keys is given (default 0)."""
    which = _exactly_one(src, section, vals, _ENERGY_KEYS, required=False)
    if which is None:
        return 0.0
    if which == "energy_eV":
        return vals["energy_eV"]
    record = material.record
    gap = record.value("band_gap_eV")
    if gap is None:
        raise ScenarioError(src, section, which, "a level given from a band edge needs the "
                            "gap and the intrinsic level: give [material] name")
    depth = vals[which]
    if not 0.0 <= depth <= gap:
        raise ScenarioError(src, section, which, f"must lie in the gap, within [0, {gap:.4g}] "
                            f"eV for {material.name} at {material.temperature_K:g} K, got "
                            f"{depth!r}")
    if which == "energy_below_conduction_eV":
        return record.trap_energy(below_conduction_eV=depth)
    return record.trap_energy(above_valence_eV=depth)


def _capture(src: str, section: str, vals: dict, material: Material, carrier: str) -> float:
    """c = given coefficient, or sigma v_th (the trap's v_th, else the material's) [cm^3/s]."""
    direct, xsec = f"{carrier}_capture_cm3_s", f"{carrier}_cross_section_cm2"
    got = _exactly_one(src, section, vals, (direct, xsec))
    if got == direct:
        return vals[direct]
    v_th = vals["thermal_velocity_cm_s"]
    if v_th is None:
        v_th = material.record.value(f"{carrier}_thermal_velocity_cm_s")
    if v_th is None:
        raise ScenarioError(
            src, section, "thermal_velocity_cm_s",
            f"{xsec} needs thermal_velocity_cm_s (c = sigma v_th), or a [material] name or "
            f"{carrier}_thermal_velocity_cm_s that gives it",
        )
    return vals[xsec] * v_th


def _parse_trap(src: str, index: int, table: Any, volume: Volume, material: Material) -> Trap:
    label = table.get("label") if isinstance(table, dict) else None
    section = f"traps.{label}" if isinstance(label, str) and label else f"traps[{index}]"
    vals = _read_table(src, section, table, _TRAP)
    which = _exactly_one(src, section, vals, ("count", "density_cm3", "areal_density_cm2"))
    if which == "areal_density_cm2" and volume.surface_area_cm2 is None:
        raise ScenarioError(
            src, section, "areal_density_cm2",
            "needs a surface area: give [volume] size_nm or surface_area_cm2",
        )
    caps = {c: _capture(src, section, vals, material, c) for c in ("electron", "hole")}
    if vals["thermal_velocity_cm_s"] is not None and all(
        vals[f"{c}_cross_section_cm2"] is None for c in ("electron", "hole")
    ):
        raise ScenarioError(
            src, section, "thermal_velocity_cm_s",
            "is used only with a cross section; it would be ignored here",
        )
    if vals["sublevels_per_decade"] is not None and vals["spread_decades"] == 0.0:
        raise ScenarioError(
            src, section, "sublevels_per_decade",
            "is used only with spread_decades > 0; it would be ignored here",
        )
    if caps["electron"] == 0.0 and caps["hole"] == 0.0:
        raise ScenarioError(
            src, section, "electron_capture_cm3_s",
            "a trap level that captures neither electrons nor holes does nothing; remove it",
        )
    return Trap(
        label=vals["label"],
        count=vals["count"],
        density_cm3=vals["density_cm3"],
        areal_density_cm2=vals["areal_density_cm2"],
        energy_eV=_trap_energy(src, section, vals, material),
        kind=vals["kind"],
        electron_capture_cm3_s=caps["electron"],
        hole_capture_cm3_s=caps["hole"],
        spread_decades=vals["spread_decades"],
        sublevels_per_decade=vals["sublevels_per_decade"],
    )


def _check_modulation(src: str, light: Light, table: dict) -> None:
    if light.modulated:
        if light.modulation_frequency_Hz <= 0:
            raise ScenarioError(src, "light", "modulation_frequency_Hz",
                                f"waveform = {light.waveform!r} needs a frequency > 0")
        if light.modulation_depth > 1.0:
            raise ScenarioError(src, "light", "modulation_depth",
                                f"must be within [0, 1], got {light.modulation_depth!r}")
    else:
        for key in ("modulation_frequency_Hz", "modulation_depth"):
            if key in table:
                raise ScenarioError(src, "light", key, f"is used only with waveform = 'sine' or "
                                    f"'square'; it would be ignored with {light.waveform!r}")


def _check_channels(src: str, material: Material, light: Light, traps: tuple[Trap, ...], *,
                    collecting: bool = False, exchanging: bool = False) -> None:
    """Refuse scenarios in which nothing can happen or carriers are made but never lost."""
    band = (material.radiative_cm3_s, material.auger_electron_cm6_s, material.auger_hole_cm6_s)
    has_loss = exchanging or any(c > 0 for c in band) or any(
        t.electron_capture_cm3_s > 0 and t.hole_capture_cm3_s > 0 for t in traps)
    light_on = light.waveform != "off" and light.generation_cm3_s > 0
    if not has_loss and not traps and not light_on and not collecting:
        raise ScenarioError(src, "material", "radiative_cm3_s",
                            "no event channel: give a radiative or Auger coefficient, a trap "
                            "level or light")
    if light_on and not has_loss:
        raise ScenarioError(src, "light", "generation_cm3_s",
                            "light makes pairs but nothing recombines them (no radiative or "
                            "Auger coefficient, no trap level capturing both carriers): the "
                            "counts would grow without bound")


def check_counts(scenario: Scenario) -> None:
    """Refuse derived counts beyond the engine's exact range (:data:`COUNT_MAX`).

    Each count is density x volume (or areal density x surface area); their sum bounds every
    species the engine and the exact solver track (free carriers, occupied traps).  Called
    by ``check``, ``run``, ``exact``, ``sweep`` and :func:`grmc.simulate.run` (the continuum
    alone may still be asked about a larger volume from Python).

    Raises
    ------
    ScenarioError  Naming the key of the largest contribution.
    """
    src, material, volume = scenario.source, scenario.material, scenario.volume
    traps, start = scenario.traps, scenario.start
    vol = volume.volume_cm3
    if vol < VOLUME_MIN:
        raise ScenarioError(src, "volume", "size_nm", f"the box is {vol:.3g} cm^3, smaller "
                            f"than {VOLUME_MIN:g} cm^3 (less than one atom)")
    parts = [
        ("material", "intrinsic_density_cm3", material.intrinsic_density_cm3 * vol),
        ("material", "donors_cm3", material.donors_cm3 * vol),
        ("material", "acceptors_cm3", material.acceptors_cm3 * vol),
        ("start", "excess_pairs", 2.0 * start.excess_pairs),  # an electron and a hole each
    ]
    for trap in traps:
        section = f"traps.{trap.label}"
        if trap.count is not None:
            parts.append((section, "count", float(trap.count)))
        elif trap.density_cm3 is not None:
            parts.append((section, "density_cm3", trap.density_cm3 * vol))
        else:
            parts.append((section, "areal_density_cm2",
                          trap.areal_density_cm2 * (volume.surface_area_cm2 or 0.0)))
    total = sum(p[2] for p in parts)
    if total > COUNT_MAX:
        section, key, biggest = max(parts, key=lambda p: p[2])
        raise ScenarioError(src, section, key, f"gives {biggest:.3g} particles in the volume "
                            f"(all counts together {total:.3g}), beyond the {COUNT_MAX:.3g} "
                            "the event engine counts exactly; use a smaller volume")


def parse_scenario(data: dict[str, Any], *, source: str = "<string>", text: str = "") -> Scenario:
    """Validate an already-parsed TOML document.

    Parameters
    ----------
    data : dict
        The document as returned by :func:`tomllib.loads`.
    source : str
        Name used in error messages [file name].
    text : str
        The TOML text, kept in the scenario and in output files.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        On any unknown key, wrong type, value out of range or broken exactly-one-of rule.
    """
    src = source
    allowed_top = set(_TOP) | set(_SECTIONS_ALLOWED)
    for key, value in data.items():
        if key not in allowed_top:
            raise ScenarioError(src, "", key, "unknown key or section" + _hint(key, allowed_top))
        if key in _SECTIONS_ALLOWED and key != "traps" and not isinstance(value, dict):
            raise ScenarioError(src, key, "", "expected a table, e.g. [" + key + "]")
    top = _read_table(src, "", {k: v for k, v in data.items() if k in _TOP}, _TOP)
    if not top["title"].strip():
        raise ScenarioError(src, "", "title", "must not be empty")
    if "material" not in data:
        raise ScenarioError(src, "material", "", "missing section")
    if "volume" not in data:
        raise ScenarioError(src, "volume", "", "missing section")
    readout_vals = None
    if "readout" in data:
        readout_vals = _read_table(src, "readout", data["readout"], _READOUT)
    material = _parse_material(src, data["material"], readout_vals)
    volume = _parse_volume(src, data["volume"])

    traps_raw = data.get("traps", [])
    if not isinstance(traps_raw, list):
        raise ScenarioError(src, "traps", "", "expected an array of tables: [[traps]]")
    traps = tuple(_parse_trap(src, i, t, volume, material) for i, t in enumerate(traps_raw))
    seen: set[str] = set()
    for trap in traps:
        if trap.label in seen:
            raise ScenarioError(src, f"traps.{trap.label}", "label", "duplicate trap label")
        seen.add(trap.label)

    light = Light(**_read_table(src, "light", data.get("light", {}), _LIGHT))
    _check_modulation(src, light, data.get("light", {}))
    start = Start(**_read_table(src, "start", data.get("start", {}), _START))
    run = RunSettings(**_read_table(src, "run", data.get("run", {}), _RUN))
    readout = None
    if readout_vals is not None:
        readout = _parse_readout(src, readout_vals, material)
    reservoir = None
    if "reservoir" in data:
        reservoir = Reservoir(**_read_table(src, "reservoir", data["reservoir"], _RESERVOIR))
        if not math.isfinite(reservoir.exchange_time(readout)):
            raise ScenarioError(src, "reservoir", "exchange_time_s",
                                "give the exchange time, or a [readout] whose bias and "
                                f"{reservoir.carrier[:-1]} mobility set a finite transit time")
    _check_channels(src, material, light, traps,
                    collecting=readout is not None and readout.collection == "events",
                    exchanging=reservoir is not None)
    population = None
    if "population" in data:
        population = Population(**_read_table(src, "population", data["population"],
                                              _POPULATION))
    return Scenario(
        title=top["title"],
        notes=top["notes"],
        material=material,
        volume=volume,
        traps=traps,
        light=light,
        start=start,
        run=run,
        readout=readout,
        population=population,
        reservoir=reservoir,
        source=source,
        text=text,
    )


def load_scenario(path: str | Path | None = None, *, text: str | None = None) -> Scenario:
    """Read and validate a scenario from a TOML file or from a TOML string.

    Parameters
    ----------
    path : str or Path, optional
        Scenario file.
    text : str, optional
        TOML text (give exactly one of ``path`` and ``text``).

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        Missing or unreadable file, text that is not TOML, or any invalid key.

    Examples
    --------
    >>> s = load_scenario(text='''
    ... title = "box"
    ... [material]
    ... temperature_K = 300.0
    ... intrinsic_density_cm3 = 1e10
    ... [volume]
    ... volume_cm3 = 1e-15
    ... ''')
    >>> s.volume.volume_cm3
    1e-15
    """
    if (path is None) == (text is None):
        raise TypeError("give exactly one of path and text")
    if path is not None:
        source = str(path)
        try:
            text = Path(path).read_text(encoding="utf-8")
        except FileNotFoundError:
            raise ScenarioError(source, "", "", "no such file") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ScenarioError(source, "", "", f"cannot read the file ({exc})") from None
    else:
        source = "<string>"
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(source, "", "", f"not valid TOML ({exc})") from None
    return parse_scenario(data, source=source, text=text)


def set_key(data: dict[str, Any], dotted: str, value: Any, *, source: str = "<sweep>") -> None:
    """Set ``section.key`` (or ``traps.<label>.key``) in a parsed TOML document, in place.

    Used by parameter sweeps; the document must be validated again afterwards.

    Raises
    ------
    ScenarioError
        When the section, trap label or key does not exist in the format.
    """
    parts = dotted.split(".")
    if len(parts) == 3 and parts[0] == "traps":
        _, label, key = parts
        if key not in _TRAP:
            raise ScenarioError(source, f"traps.{label}", key, "unknown key" + _hint(key, _TRAP))
        for trap in data.get("traps", []):
            if trap.get("label") == label:
                for group in (("count", "density_cm3", "areal_density_cm2"), _ENERGY_KEYS):
                    if key in group:  # exactly one of: the swept form replaces the others
                        for other in group:
                            trap.pop(other, None)
                trap[key] = value
                return
        raise ScenarioError(source, f"traps.{label}", "label", "no trap level with this label")
    if len(parts) != 2:
        raise ScenarioError(source, "", dotted, "expected section.key or traps.<label>.key")
    section, key = parts
    if section not in SCHEMA or section == "traps":
        raise ScenarioError(source, section, key, "unknown section" + _hint(section, SCHEMA))
    if key not in SCHEMA[section]:
        raise ScenarioError(source, section, key, "unknown key" + _hint(key, SCHEMA[section]))
    table = data.setdefault(section, {})
    if section == "volume":  # the exactly-one-of rule: a swept volume replaces the other form
        for other in ("size_nm", "volume_cm3"):
            if other != key and key in ("size_nm", "volume_cm3"):
                table.pop(other, None)
    table[key] = value
