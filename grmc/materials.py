"""Built-in semiconductors: material parameters at a temperature, each with its source.

From a material name (and a composition for the alloys) and the lattice temperature this
module gives the band gap, the intrinsic density, the band-to-band (radiative) and Auger
coefficients, the thermal velocities of both carriers and their mobilities, each as a
:class:`Value` that carries its units and the published source it came from.  A value
outside the temperature or composition range its law was fitted on comes with a warning
naming that range; a law that would be meaningless (a gap <= 0, a composition outside
[0, 1]) raises :class:`MaterialError`.  Where the library knows no temperature law for a
quantity it holds the 300 K value constant, says so in the source, and warns when the
temperature is more than :data:`HELD_CONSTANT_SPAN` away from 300 K.

Every number below was entered from memory of the cited publication (marked "from memory"
in each source); ``tests/test_materials.py`` checks them against independently published
values (handbook intrinsic densities and gaps at 300 K) with tolerances set by the spread of
published values.  ``docs/materials.md`` has the one table of every law, source and range.

Laws
----
Band gap (Varshni 1967):           E_g(T) = E_0 - alpha T^2 / (T + beta)
Densities of states (parabolic):   N_c,v(T) = N_c,v(300 K) (T / 300)^(3/2)
Intrinsic density:                 n_i = sqrt(N_c N_v) exp(-E_g / 2kT)    (Si and HgCdTe:
                                   published fits, below)
Intrinsic level:                   E_i - (E_c + E_v)/2 = (kT/2) ln(N_v / N_c)
Thermal velocity:                  v_th = v_th(300 K) sqrt(T / 300) = sqrt(3kT / m*)
Lattice mobility (Si, Ge):         mu(T) = mu(300 K) (T / 300)^-k

References
----------
Y. P. Varshni, "Temperature dependence of the energy gap in semiconductors", Physica 34,
149 (1967).  M. E. Levinshtein, S. L. Rumyantsev and M. S. Shur (eds.), Handbook Series on
Semiconductor Parameters, vols. 1 and 2 (World Scientific, 1996, 1999).  Further sources at
each law.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

__all__ = [
    "NAMES",
    "ALLOYS",
    "PARAMETERS",
    "MaterialError",
    "Value",
    "MaterialRecord",
    "varshni_gap",
    "hgcdte_gap",
    "hgcdte_intrinsic_density",
    "silicon_intrinsic_density",
    "ingaas_gap",
    "properties",
    "resolve",
]

#: Boltzmann constant [eV/K] (CODATA 2018, exact).
BOLTZMANN_EV_K = 8.617333262e-5
_BOLTZMANN_J_K = 1.380649e-23  # [J/K] (CODATA 2018, exact)
_ELECTRON_MASS_KG = 9.1093837015e-31  # [kg] (CODATA 2018)
_PLANCK_J_S = 6.62607015e-34  # [J s] (CODATA 2018, exact)

#: The built-in materials, as ``[material] name`` takes them.
NAMES = ("Si", "Ge", "GaAs", "InP", "InAs", "InSb", "InGaAs", "HgCdTe")
#: Alloys, which need ``composition_x``: HgCdTe is Hg(1-x)Cd(x)Te, InGaAs is In(1-x)Ga(x)As.
ALLOYS = ("InGaAs", "HgCdTe")

#: Every parameter the library resolves, with its UDUNITS units.
PARAMETERS = {
    "band_gap_eV": "eV",
    "intrinsic_density_cm3": "cm-3",
    "radiative_cm3_s": "cm3 s-1",
    "auger_electron_cm6_s": "cm6 s-1",
    "auger_hole_cm6_s": "cm6 s-1",
    "electron_thermal_velocity_cm_s": "cm s-1",
    "hole_thermal_velocity_cm_s": "cm s-1",
    "electron_mobility_cm2_Vs": "cm2 V-1 s-1",
    "hole_mobility_cm2_Vs": "cm2 V-1 s-1",
}

#: A value held at its 300 K figure warns beyond this distance from 300 K [K].
HELD_CONSTANT_SPAN = 50.0

_MEM = "from memory"
_LRS = ("Levinshtein, Rumyantsev & Shur (eds.), Handbook Series on Semiconductor Parameters "
        "vol. 1 (1996)")
_VMR = "Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815 (2001)"
_SZE = "Sze & Ng, Physics of Semiconductor Devices, 3rd ed. (2007)"
_HSC = "Hansen, Schmit & Casselman, J. Appl. Phys. 53, 7099 (1982)"
_HS = "Hansen & Schmit, J. Appl. Phys. 54, 1639 (1983)"
_MT = "Misiakos & Tsamakis, J. Appl. Phys. 74, 3293 (1993)"
_ROSBECK = "Rosbeck et al., J. Appl. Phys. 53, 6430 (1982)"
_ROGALSKI = "Rogalski, Rep. Prog. Phys. 68, 2267 (2005)"
_WEILER = "Weiler, Semiconductors and Semimetals 16, 119 (1981)"


class MaterialError(ValueError):
    """A material law asked for where it is meaningless.

    Attributes
    ----------
    key : str  The ``[material]`` key at fault (e.g. ``composition_x``)
    message : str  What is wrong
    """

    def __init__(self, key: str, message: str):
        self.key = key
        self.message = message
        super().__init__(f"{key}: {message}")


@dataclass(frozen=True)
class Value:
    """One resolved parameter.

    Attributes
    ----------
    value : float  In ``units``
    units : str  UDUNITS string
    source : str  ``"scenario"``, or the law and its published source
    """

    value: float
    units: str
    source: str


@dataclass(frozen=True)
class MaterialRecord:
    """Every resolved material parameter and where it came from.

    Attributes
    ----------
    name : str or None  Library material, None when every value came from the scenario
    composition_x : float or None  Alloy composition x [1]
    temperature_K : float  Lattice temperature [K]
    values : dict of str -> Value  Keyed by :data:`PARAMETERS` names (only those known)
    intrinsic_level_eV : float or None  E_i - (E_c + E_v)/2 = (kT/2) ln(N_v/N_c) [eV]
    warnings : tuple of str  Laws used outside their published range, values held constant
    warning_keys : tuple of tuple of str  The parameters each warning concerns (a warning
        goes when the scenario overrides all of them)
    """

    name: str | None
    composition_x: float | None
    temperature_K: float
    values: dict = field(default_factory=dict)
    intrinsic_level_eV: float | None = None
    warnings: tuple[str, ...] = ()
    warning_keys: tuple[tuple[str, ...], ...] = ()

    def value(self, key: str) -> float | None:
        """The value of one parameter, None when unknown."""
        entry = self.values.get(key)
        return None if entry is None else entry.value

    def unused(self, keys: tuple[str, ...]) -> MaterialRecord:
        """The record without the warnings that concern only ``keys`` (values not used)."""
        kept = [(k, w) for k, w in zip(self.warning_keys, self.warnings) if set(k) - set(keys)]
        return replace(self, warnings=tuple(w for _, w in kept),
                       warning_keys=tuple(k for k, _ in kept))

    def as_json(self) -> dict:
        """``{key: {"value", "units", "from"}}`` as ``grmc check --json`` prints it."""
        return {k: {"value": v.value, "units": v.units, "from": v.source}
                for k, v in self.values.items()}

    def trap_energy(self, *, below_conduction_eV: float | None = None,
                    above_valence_eV: float | None = None) -> float:
        """E_t - E_i [eV] of a level given from a band edge.

        Parameters
        ----------
        below_conduction_eV : float, optional  E_c - E_t [eV]
        above_valence_eV : float, optional  E_t - E_v [eV]

        Returns
        -------
        float  E_t - E_i [eV], with E_i - E_v = E_g/2 + (kT/2) ln(N_v/N_c) (common practice;
            e.g. Sze & Ng, Physics of Semiconductor Devices, 3rd ed., eq. 1.26, from memory)
        """
        gap = self.value("band_gap_eV")
        if gap is None or self.intrinsic_level_eV is None:
            raise ValueError("a level given from a band edge needs the gap of a library material")
        ei_above_v = 0.5 * gap + self.intrinsic_level_eV
        if below_conduction_eV is not None:
            return (gap - below_conduction_eV) - ei_above_v
        return above_valence_eV - ei_above_v


# --------------------------------------------------------------------------------------------
# Laws
# --------------------------------------------------------------------------------------------


def varshni_gap(temperature_K: float, e0_eV: float, alpha_eV_K: float, beta_K: float) -> float:
    """Band gap by Varshni's law [eV].

    Parameters
    ----------
    temperature_K : float  [K]
    e0_eV : float  Gap at 0 K [eV]
    alpha_eV_K : float  [eV/K]
    beta_K : float  [K]

    Notes
    -----
    E_g(T) = E_0 - alpha T^2 / (T + beta)  (Varshni, Physica 34, 149, 1967, eq. 4).
    """
    t = temperature_K
    return e0_eV - alpha_eV_K * t * t / (t + beta_K)


def hgcdte_gap(x: float, temperature_K: float) -> float:
    """Band gap of Hg(1-x)Cd(x)Te [eV] (negative: a semimetal).

    Notes
    -----
    E_g = -0.302 + 1.93 x - 0.81 x^2 + 0.832 x^3 + 5.35e-4 T (1 - 2x)  [eV, T in K].

    References
    ----------
    G. L. Hansen, J. L. Schmit and T. N. Casselman, J. Appl. Phys. 53, 7099 (1982).
    """
    return (-0.302 + 1.93 * x - 0.81 * x**2 + 0.832 * x**3
            + 5.35e-4 * temperature_K * (1.0 - 2.0 * x))


def hgcdte_intrinsic_density(x: float, temperature_K: float) -> float:
    """Intrinsic density of Hg(1-x)Cd(x)Te [cm^-3] (gap from :func:`hgcdte_gap`).

    Notes
    -----
    n_i = (5.585 - 3.82 x + 1.753e-3 T - 1.364e-3 x T) 1e14 E_g^(3/4) T^(3/2) exp(-E_g/2kT)
    [cm^-3, E_g in eV, T in K].

    References
    ----------
    G. L. Hansen and J. L. Schmit, J. Appl. Phys. 54, 1639 (1983).
    """
    return math.exp(_hgcdte_log_ni(x, temperature_K))


def _hgcdte_log_ni(x: float, t: float) -> float:
    """ln n_i of :func:`hgcdte_intrinsic_density` (finite where n_i itself underflows)."""
    gap = hgcdte_gap(x, t)
    pre = (5.585 - 3.82 * x + 1.753e-3 * t - 1.364e-3 * x * t) * 1e14
    return (math.log(pre) + 0.75 * math.log(gap) + 1.5 * math.log(t)
            - gap / (2.0 * BOLTZMANN_EV_K * t))


def silicon_intrinsic_density(temperature_K: float) -> float:
    """Intrinsic density of silicon [cm^-3], the fit of Misiakos & Tsamakis (78-340 K).

    Notes
    -----
    n_i = 5.29e19 (T/300)^2.54 exp(-6726 / T)  [cm^-3]; 9.7e9 cm^-3 at 300 K.

    References
    ----------
    K. Misiakos and D. Tsamakis, "Accurate measurements of the silicon intrinsic carrier
    density from 78 to 340 K", J. Appl. Phys. 74, 3293 (1993) (from memory).
    """
    t = temperature_K
    return 5.29e19 * (t / 300.0) ** 2.54 * math.exp(-6726.0 / t)


#: Gamma-gap bowing of In(1-x)Ga(x)As [eV] (Vurgaftman et al. 2001, from memory).
INGAAS_BOWING_EV = 0.477


def ingaas_gap(x: float, temperature_K: float) -> float:
    """Band gap of In(1-x)Ga(x)As [eV]: Vegard interpolation of GaAs and InAs with bowing.

    Notes
    -----
    E_g(x, T) = x E_g,GaAs(T) + (1 - x) E_g,InAs(T) - x (1 - x) C, C = 0.477 eV
    (Vurgaftman, Meyer & Ram-Mohan, J. Appl. Phys. 89, 5815, 2001, from memory); the
    binaries' gaps from their Varshni laws in this library.
    """
    ga, in_ = _BINARIES["GaAs"].gap(temperature_K), _BINARIES["InAs"].gap(temperature_K)
    return x * ga + (1.0 - x) * in_ - x * (1.0 - x) * INGAAS_BOWING_EV


def _dos_cm3(mass_ratio: float, temperature_K: float) -> float:
    """Effective density of states 2 (2 pi m* kT / h^2)^(3/2) [cm^-3] (common practice)."""
    m = mass_ratio * _ELECTRON_MASS_KG
    per_m3 = 2.0 * (2.0 * math.pi * m * _BOLTZMANN_J_K * temperature_K / _PLANCK_J_S**2) ** 1.5
    return per_m3 * 1e-6


def _thermal_velocity_cm_s(mass_ratio: float, temperature_K: float) -> float:
    """sqrt(3 kT / m*) [cm/s] (common practice)."""
    return 100.0 * math.sqrt(3.0 * _BOLTZMANN_J_K * temperature_K
                             / (mass_ratio * _ELECTRON_MASS_KG))


# --------------------------------------------------------------------------------------------
# The binaries: one row each
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Binary:
    """Table row of a binary semiconductor (300 K figures unless stated)."""

    varshni: tuple[float, float, float]  # E_0 [eV], alpha [eV/K], beta [K]
    varshni_source: str
    dos_300: tuple[float, float]  # N_c, N_v at 300 K [cm^-3]
    vth_300: tuple[float, float]  # electron, hole thermal velocity at 300 K [cm/s]
    mobility_300: tuple[float, float]  # lattice mobilities at 300 K [cm^2/(V s)]
    mobility_exponents: tuple[float, float] | None  # k in mu ~ T^-k; None: held constant
    mobility_source: str
    radiative: float | None  # B [cm^3/s]
    radiative_source: str
    auger: tuple[float | None, float | None]  # C_n, C_p [cm^6/s]
    auger_source: str

    def gap(self, temperature_K: float) -> float:
        return varshni_gap(temperature_K, *self.varshni)


_BINARIES: dict[str, _Binary] = {
    "Si": _Binary(
        (1.170, 4.73e-4, 636.0), _LRS, (3.2e19, 1.8e19), (2.3e7, 1.65e7),
        (1400.0, 450.0), (2.42, 2.20), f"{_LRS} (300 K values); exponents from {_SZE}",
        4.73e-15, "Trupke et al., J. Appl. Phys. 94, 4930 (2003)",
        (2.8e-31, 9.9e-32), "Dziewior & Schmid, Appl. Phys. Lett. 31, 346 (1977)"),
    "Ge": _Binary(
        (0.7437, 4.774e-4, 235.0), _LRS, (1.0e19, 5.0e18), (3.1e7, 1.9e7),
        (3900.0, 1900.0), (1.66, 2.33), f"{_LRS} (300 K values); exponents from {_SZE}",
        6.41e-14, _LRS, (1.0e-30, 1.0e-30), _LRS),
    "GaAs": _Binary(
        (1.519, 5.405e-4, 204.0), _LRS, (4.7e17, 9.0e18), (4.4e7, 1.8e7),
        (8500.0, 400.0), None, _LRS, 7.2e-10, _LRS, (1.0e-30, 1.0e-30), _LRS),
    "InP": _Binary(
        (1.421, 4.9e-4, 327.0), _LRS, (5.7e17, 1.1e19), (3.9e7, 1.7e7),
        (5400.0, 200.0), None, _LRS, 1.2e-10, _LRS, (None, None), ""),
    "InAs": _Binary(
        (0.415, 2.76e-4, 83.0), _LRS, (8.7e16, 6.6e18), (7.7e7, 2.0e7),
        (40000.0, 500.0), None, _LRS, 1.1e-10, _LRS, (2.2e-27, None), _LRS),
    "InSb": _Binary(
        (0.235, 3.2e-4, 170.0), _VMR, (4.2e16, 7.3e18), (9.8e7, 1.8e7),
        (77000.0, 850.0), None, _LRS, 5.0e-11, _LRS, (None, None), ""),
}

#: Temperature ranges [K] outside which a law warns: Varshni fits (data from liquid-helium
#: temperatures to somewhat above room temperature), lattice-mobility power laws.
_GAP_RANGE_K = (0.0, 500.0)
_MOBILITY_RANGE_K = (100.0, 400.0)
_SI_NI_RANGE_K = (78.0, 340.0)
_HGCDTE_X_RANGE = (0.0, 0.6)  # Hansen-Schmit-Casselman gap and Hansen-Schmit n_i
_HGCDTE_T_RANGE_K = (4.2, 300.0)
_ROSBECK_X_RANGE = (0.2, 0.6)
_ROSBECK_T_MIN_K = 50.0
# the values a gap law's range concerns (the intrinsic density and what follows from it)
_GAP_KEYS = ("band_gap_eV", "intrinsic_density_cm3")
_HGCDTE_GAP_KEYS = _GAP_KEYS + ("radiative_cm3_s", "auger_electron_cm6_s", "auger_hole_cm6_s",
                                "electron_thermal_velocity_cm_s", "hole_thermal_velocity_cm_s")


class _Collector:
    """Values and warnings of one resolution."""

    def __init__(self, name: str, temperature_K: float):
        self.name = name
        self.t = temperature_K
        self.values: dict[str, Value] = {}
        self.warnings: list[tuple[tuple[str, ...], str]] = []

    def put(self, key: str, value: float | None, source: str) -> None:
        if value is not None:
            self.values[key] = Value(float(value), PARAMETERS[key], f"{source}, {_MEM}")

    def held(self, key: str, value: float | None, source: str) -> None:
        """A 300 K value held constant (no temperature law in the library)."""
        if value is None:
            return
        self.put(key, value, f"{source}: 300 K value held constant")
        if abs(self.t - 300.0) > HELD_CONSTANT_SPAN:
            self.warnings.append(((key,),
                f"{key}: the {self.name} value is that of 300 K held constant (no temperature "
                f"law in the library); {self.t:g} K is far from 300 K, give the key if you "
                "know a better value"))

    def check_range(self, keys: tuple[str, ...], what: str, value: float, lo: float,
                    hi: float, unit: str) -> None:
        """Warn (about the parameters ``keys``) when ``value`` is outside [lo, hi]."""
        if not lo <= value <= hi:
            u = f" {unit}" if unit else ""
            span = f"above {lo:g}{u}" if math.isinf(hi) else f"for {lo:g} to {hi:g}{u}"
            self.warnings.append(
                (keys, f"{what} is fitted {span}; {value:g}{u} is outside that range"))


def _binary(name: str, t: float) -> tuple[_Collector, float, float]:
    """Resolve a binary; returns the collector and N_c, N_v [cm^-3]."""
    row = _BINARIES[name]
    c = _Collector(name, t)
    gap = row.gap(t)
    if gap <= 0:  # cannot happen inside any table row's range; guards extrapolation
        raise MaterialError("temperature_K", f"the {name} gap law gives {gap:.3g} eV at {t:g} K")
    c.put("band_gap_eV", gap, f"Varshni law, Physica 34, 149 (1967); coefficients of "
          f"{row.varshni_source}")
    c.check_range(_GAP_KEYS, f"the {name} band-gap law", t, *_GAP_RANGE_K, "K")
    scale = (t / 300.0) ** 1.5
    nc, nv = row.dos_300[0] * scale, row.dos_300[1] * scale
    if name == "Si":
        c.put("intrinsic_density_cm3", silicon_intrinsic_density(t), _MT)
        c.check_range(("intrinsic_density_cm3",), "the Si intrinsic-density fit", t,
                      *_SI_NI_RANGE_K, "K")
    else:
        ni = math.sqrt(nc * nv) * math.exp(-gap / (2.0 * BOLTZMANN_EV_K * t))
        c.put("intrinsic_density_cm3", ni, f"sqrt(N_c N_v) exp(-E_g/2kT) with N_c, N_v of "
              f"{_LRS} scaled as T^(3/2)")
    root = math.sqrt(t / 300.0)
    for key, v in zip(("electron_thermal_velocity_cm_s", "hole_thermal_velocity_cm_s"),
                      row.vth_300):
        c.put(key, v * root, f"{_LRS} (300 K) scaled as sqrt(T/300)")
    keys = ("electron_mobility_cm2_Vs", "hole_mobility_cm2_Vs")
    if row.mobility_exponents is None:
        for key, mu in zip(keys, row.mobility_300):
            c.held(key, mu, row.mobility_source)
    else:
        for key, mu, k in zip(keys, row.mobility_300, row.mobility_exponents):
            c.put(key, mu * (t / 300.0) ** -k,
                  f"lattice mobility (T/300)^-{k:g}, {row.mobility_source}")
        c.check_range(keys, f"the {name} lattice-mobility law", t, *_MOBILITY_RANGE_K, "K")
    c.held("radiative_cm3_s", row.radiative, row.radiative_source)
    c.held("auger_electron_cm6_s", row.auger[0], row.auger_source)
    c.held("auger_hole_cm6_s", row.auger[1], row.auger_source)
    return c, nc, nv


def _ingaas(x: float, t: float) -> tuple[_Collector, float, float]:
    """In(1-x)Ga(x)As: gap with bowing, masses interpolated linearly (Vegard)."""
    c = _Collector("InGaAs", t)
    gap = ingaas_gap(x, t)
    c.put("band_gap_eV", gap, f"x E_g(GaAs) + (1-x) E_g(InAs) - x(1-x) {INGAAS_BOWING_EV} eV, "
          f"bowing of {_VMR}")
    c.check_range(_GAP_KEYS, "the InGaAs band-gap law", t, *_GAP_RANGE_K, "K")
    ga, in_ = _BINARIES["GaAs"], _BINARIES["InAs"]
    # density-of-states masses from N(300 K) = 2.509e19 (m*/m0)^(3/2), interpolated linearly
    m300 = _dos_cm3(1.0, 300.0)
    dos = []
    for k in range(2):
        m = x * (ga.dos_300[k] / m300) ** (2 / 3) + (1 - x) * (in_.dos_300[k] / m300) ** (2 / 3)
        dos.append(_dos_cm3(m, t))
    ni = math.sqrt(dos[0] * dos[1]) * math.exp(-gap / (2.0 * BOLTZMANN_EV_K * t))
    c.put("intrinsic_density_cm3", ni, f"sqrt(N_c N_v) exp(-E_g/2kT), density-of-states masses "
          f"of GaAs and InAs ({_LRS}) interpolated linearly in x")
    for k, key in enumerate(("electron_thermal_velocity_cm_s", "hole_thermal_velocity_cm_s")):
        # the thermal mass 3kT/v^2 interpolated linearly in x
        inv_v2 = x / ga.vth_300[k] ** 2 + (1 - x) / in_.vth_300[k] ** 2
        c.put(key, math.sqrt(t / 300.0 / inv_v2),
              f"sqrt(3kT/m*), masses of GaAs and InAs ({_LRS}) interpolated linearly in x")
    return c, dos[0], dos[1]


def _hgcdte_masses(gap: float) -> tuple[float, float]:
    """Electron and hole masses of HgCdTe [m0]: Kane's two-band law and a fixed hole mass.

    m0 / m_e = 1 + 2F + (E_p/3) (2/E_g + 1/(E_g + Delta)), E_p = 19 eV, Delta = 1 eV,
    F = -0.8 (Weiler 1981, from memory); m_h = 0.55 m0 (Rogalski 2005, from memory).
    """
    inv = 1.0 + 2.0 * (-0.8) + (19.0 / 3.0) * (2.0 / gap + 1.0 / (gap + 1.0))
    return 1.0 / inv, 0.55


def _hgcdte_recombination(x: float, t: float, gap: float, me: float, mh: float
                          ) -> tuple[float, float, float]:
    """B [cm^3/s], C_n and C_p [cm^6/s] of HgCdTe (Rogalski 2005, from memory).

    B = 5.8e-13 eps^(1/2) (1/(m_e + m_h))^(3/2) (1 + 1/m_e + 1/m_h) (300/T)^(3/2) E_g^2
    (the van Roosbroeck-Shockley relation for parabolic bands; masses in m0, E_g in eV);
    tau_A1 = 3.8e-18 eps^2 (1+mu)^(1/2) (1+2mu) exp[(1+2mu)/(1+mu) E_g/kT]
             / (m_e |F1F2|^2 (kT/E_g)^(3/2)),  mu = m_e/m_h, |F1F2| = 0.2,
    C_n = 1 / (2 n_i^2 tau_A1) (Beattie & Landsberg 1959 in Blakemore's form);
    C_p = C_n / gamma with gamma = tau_A7 / tau_A1 = 20.  eps = 15.2 - 15.6x + 8.2x^2 - 3.2x^3
    is the high-frequency dielectric constant.
    """
    eps = 15.2 - 15.6 * x + 8.2 * x**2 - 3.2 * x**3
    b = (5.8e-13 * math.sqrt(eps) * (1.0 / (me + mh)) ** 1.5 * (1.0 + 1.0 / me + 1.0 / mh)
         * (300.0 / t) ** 1.5 * gap**2)
    kt = BOLTZMANN_EV_K * t
    mu = me / mh
    f1f2 = 0.2
    log_tau_a1 = (math.log(3.8e-18 * eps**2 * math.sqrt(1 + mu) * (1 + 2 * mu)
                           / (me * f1f2**2 * (kt / gap) ** 1.5))
                  + (1 + 2 * mu) / (1 + mu) * gap / kt)
    # C_n = 1 / (2 n_i^2 tau_A1), in logarithms: both factors over- or underflow when cold
    cn = math.exp(-math.log(2.0) - 2.0 * _hgcdte_log_ni(x, t) - log_tau_a1)
    return b, cn, cn / 20.0


def _hgcdte(x: float, t: float) -> tuple[_Collector, float, float]:
    c = _Collector("HgCdTe", t)
    gap = hgcdte_gap(x, t)
    if gap <= 0:
        raise MaterialError(
            "composition_x", f"Hg(1-x)Cd(x)Te with x = {x:g} at {t:g} K has no gap "
            f"(E_g = {gap:.3g} eV, a semimetal): the library's laws do not apply")
    c.put("band_gap_eV", gap, _HSC)
    c.check_range(_HGCDTE_GAP_KEYS, "x of the HgCdTe laws", x, *_HGCDTE_X_RANGE, "")
    c.check_range(_HGCDTE_GAP_KEYS, "the HgCdTe gap and intrinsic-density laws", t,
                  *_HGCDTE_T_RANGE_K, "K")
    ni = hgcdte_intrinsic_density(x, t)
    c.put("intrinsic_density_cm3", ni, _HS)
    me, mh = _hgcdte_masses(gap)
    masses = f"sqrt(3kT/m*), m_e from Kane's law ({_WEILER}), m_h = 0.55 m0 ({_ROGALSKI})"
    c.put("electron_thermal_velocity_cm_s", _thermal_velocity_cm_s(me, t), masses)
    c.put("hole_thermal_velocity_cm_s", _thermal_velocity_cm_s(mh, t), masses)
    r, s = (0.2 / x) ** 0.6, (0.2 / x) ** 7.5
    mu_e = 9e8 * s / t ** (2 * r)
    c.put("electron_mobility_cm2_Vs", mu_e, f"9e8 s/T^(2r), {_ROSBECK}")
    c.put("hole_mobility_cm2_Vs", 0.01 * mu_e, f"1 % of the electron mobility, {_ROGALSKI}")
    mobilities = ("electron_mobility_cm2_Vs", "hole_mobility_cm2_Vs")
    c.check_range(mobilities, "x of the HgCdTe electron-mobility law", x, *_ROSBECK_X_RANGE,
                  "")
    c.check_range(mobilities, "the HgCdTe electron-mobility law", t, _ROSBECK_T_MIN_K,
                  math.inf, "K")
    b, cn, cp = _hgcdte_recombination(x, t, gap, me, mh)
    c.put("radiative_cm3_s", b, f"van Roosbroeck-Shockley relation as in {_ROGALSKI}")
    c.put("auger_electron_cm6_s", cn, f"Auger-1 lifetime of Beattie & Landsberg as in {_ROGALSKI}")
    c.put("auger_hole_cm6_s", cp, f"Auger-7, tau_A7/tau_A1 = 20, as in {_ROGALSKI}")
    return c, _dos_cm3(me, t), _dos_cm3(mh, t)


def properties(name: str, temperature_K: float, composition_x: float | None = None
               ) -> MaterialRecord:
    """Every library parameter of a material at a temperature.

    Parameters
    ----------
    name : str  One of :data:`NAMES`
    temperature_K : float  Lattice temperature [K], > 0
    composition_x : float, optional  Alloy composition x in [0, 1] (required for
        :data:`ALLOYS`, refused for the binaries) [1]

    Returns
    -------
    MaterialRecord  With every parameter the library has, each with its source

    Raises
    ------
    MaterialError  Unknown name, a composition missing, given for a binary or outside
        [0, 1], or a law that is meaningless there (no gap)
    """
    if name not in NAMES:
        raise MaterialError("name", f"unknown material {name!r}; the library has "
                            f"{', '.join(NAMES)}")
    t = float(temperature_K)
    if name in ALLOYS:
        if composition_x is None:
            what = "Cd in Hg(1-x)Cd(x)Te" if name == "HgCdTe" else "Ga in In(1-x)Ga(x)As"
            raise MaterialError("composition_x", f"{name} is an alloy: give composition_x "
                                f"(the fraction x of {what})")
        x = float(composition_x)
        if not 0.0 <= x <= 1.0:
            raise MaterialError("composition_x", f"must be within [0, 1], got {x:g}")
        if name == "HgCdTe" and x == 0.0:
            raise MaterialError("composition_x", "HgTe (x = 0) is a semimetal: no gap")
        c, nc, nv = (_hgcdte if name == "HgCdTe" else _ingaas)(x, t)
    else:
        if composition_x is not None:
            raise MaterialError("composition_x", f"{name} is not an alloy; composition_x "
                                f"applies only to {' and '.join(ALLOYS)}")
        x = None
        c, nc, nv = _binary(name, t)
    level = 0.5 * BOLTZMANN_EV_K * t * math.log(nv / nc)
    return MaterialRecord(name=name, composition_x=x, temperature_K=t, values=c.values,
                          intrinsic_level_eV=level,
                          warnings=tuple(text for _, text in c.warnings),
                          warning_keys=tuple(keys for keys, _ in c.warnings))


def resolve(temperature_K: float, *, name: str | None = None,
            composition_x: float | None = None,
            overrides: dict[str, float | None] | None = None,
            defaults: dict[str, float] | None = None) -> MaterialRecord:
    """The library's parameters with the scenario's explicit values winning one by one.

    Parameters
    ----------
    temperature_K : float  [K]
    name : str, optional  Library material; without it every value comes from
        ``overrides`` (or ``defaults``)
    composition_x : float, optional  Alloy composition [1]
    overrides : dict, optional  Key (a :data:`PARAMETERS` name) -> value given in the
        scenario, None where not given
    defaults : dict, optional  Key -> value used when neither the scenario nor the library
        gives one (source ``"default"``)

    Returns
    -------
    MaterialRecord

    Raises
    ------
    MaterialError  As :func:`properties`
    """
    if name is None:
        if composition_x is not None:
            raise MaterialError("composition_x", "is used only with a material name")
        record = MaterialRecord(name=None, composition_x=None, temperature_K=temperature_K)
    else:
        record = properties(name, temperature_K, composition_x)
    values = dict(record.values)
    for key, value in (defaults or {}).items():
        if key not in values:
            values[key] = Value(float(value), PARAMETERS[key],
                                "default" if name is None else "not in the library: default")
    given = {k for k, v in (overrides or {}).items() if v is not None}
    for key in given:
        values[key] = Value(float(overrides[key]), PARAMETERS[key], "scenario")
    # a warning stays while one of the values it concerns still comes from the library
    kept = [(k, w) for k, w in zip(record.warning_keys, record.warnings) if set(k) - given]
    ordered = {k: values[k] for k in PARAMETERS if k in values}
    return MaterialRecord(name=record.name, composition_x=record.composition_x,
                          temperature_K=record.temperature_K, values=ordered,
                          intrinsic_level_eV=record.intrinsic_level_eV,
                          warnings=tuple(w for _, w in kept),
                          warning_keys=tuple(k for k, _ in kept))
