"""Scenario -> Model: species, event channels, their laws, counts in the volume, charge.

This module is the ONLY place where the physics of a channel is written down.  Each channel
carries both its exact propensity (used by the event engine and the master-equation solver)
and its macroscopic rate law (used by the continuum rate equations and the linear-noise
approximation), in one product-of-factors form:

    a_r(x) = k_r * prod_f (sign_f * x[s_f] + offset_f)

with at most three factors.  The exact and the macroscopic law differ only in the offsets:
a falling factorial ``N (N - 1)`` of a three-body event has offset -1 in the exact law and 0
in the macroscopic law (the textbook ``C_n n^2 p``), and ``T_k - M_k`` (empty traps) has
offset ``T_k`` in both.

The channel table (propensities in events/s, V the volume in cm^3):

=============================  ================================  ==============
channel                        propensity                        change
=============================  ================================  ==============
thermal generation             B n_i^2 V                         e+1, h+1
radiative recombination        B N_e N_h / V                     e-1, h-1
optical generation             G V                               e+1, h+1
Auger eeh                      C_n N_e (N_e - 1) N_h / V^2       e-1, h-1
impact generation by e         C_n n_i^2 N_e                     e+1, h+1
Auger ehh                      C_p N_e N_h (N_h - 1) / V^2       e-1, h-1
impact generation by h         C_p n_i^2 N_h                     e+1, h+1
<k>: electron capture          c_n N_e (T_k - M_k) / V           e-1, M_k+1
<k>: electron emission         c_n n_1 M_k                       e+1, M_k-1
<k>: hole capture              c_p N_h M_k / V                   h-1, M_k-1
<k>: hole emission             c_p p_1 (T_k - M_k)               h+1, M_k+1
electrons collected            N_e / t_n                         none (flow 1)
holes collected                N_h / t_p                         none (flow 1)
<c> swept out                  N_c / t_x                         e-1, h-1
<c> from reservoir             c_r V / t_x                       e+1, h+1
=============================  ================================  ==============

The last four are the open volume, two alternatives:

* a photoconductor bar (``[readout] collection = "events"``, no ``[reservoir]``): a carrier
  reaching its collecting contact is one collected carrier (flow 1); the ohmic contacts
  replace it, so the counts (and neutrality) do not change;
* a volume open to a neighbouring region (``[reservoir]``): the kind ``c`` it names (the
  minority kind) leaves at ``N_c / t_x`` and enters at ``c_r V / t_x`` (``c_r`` the
  region's density), and the ohmic contact keeps the volume neutral by withdrawing or
  supplying a carrier of the other kind at once, so each exchange moves a pair.  With
  collection events the boundary to the region is the collecting one (a junction): a
  carrier swept out is collected (flow +1), one entering crosses it the other way (flow -1);
  the majority carriers only keep the volume neutral and add no collection of their own.

with n_1 = n_i exp(E_t / kT) and p_1 = n_i exp(-E_t / kT).  A channel whose coefficient is
zero is absent.

A trap level with ``spread_decades = D > 0`` is split into sub-levels ``<k>#j`` (j = 0 the
fastest), :data:`SUBLEVELS_PER_DECADE` per decade unless the level says otherwise: sub-level j
has both capture coefficients (and with them both emission rates) multiplied by
``s_j = 10^(-D (j + 1/2) / n)``, the centre in log of its share of the D decades, so the
occupancy in equilibrium is unchanged and only the time scale varies (tunnelling into an
insulator to a depth z gives the factor exp(-z / lambda); z uniform gives this log-uniform
law; McWhorter 1957).  Each sub-level is a species ``trapped:<k>#j`` of its own; the output
files show the level's total occupied count as ``trapped:<k>`` (:attr:`Model.output_matrix`).

Every channel keeps the charge

    N_e - N_h + sum_k M_k = D - A + sum_{donor-like k} T_k

References
----------
W. Shockley and W. T. Read, "Statistics of the recombinations of holes and electrons",
Phys. Rev. 87, 835 (1952).  R. N. Hall, "Electron-hole recombination in germanium",
Phys. Rev. 87, 387 (1952).  D. T. Gillespie, J. Comput. Phys. 22, 403 (1976).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from functools import cached_property

import numpy as np

from .materials import BOLTZMANN_EV_K
from .scenario import EMISSION_DENSITY_MAX, Scenario, ScenarioError

__all__ = [
    "BOLTZMANN_EV_K",
    "ELEMENTARY_CHARGE_C",
    "Counts",
    "Factor",
    "Channel",
    "Model",
    "nominal_counts",
    "draw_counts",
    "build_model",
    "sublevel_count",
    "sublevel_scales",
    "split_evenly",
    "with_every_trap",
]

#: Elementary charge [C] (CODATA 2018, exact).
ELEMENTARY_CHARGE_C = 1.602176634e-19

#: Most factors any channel's law has (three-body Auger).
MAX_FACTORS = 3

ELECTRONS = "electrons"
HOLES = "holes"

#: Sub-levels per decade of a trap level's spread of time constants (default of
#: ``[[traps]] sublevels_per_decade``): with two, the sum of their Lorentzians departs from
#: a straight 1/f line by about 1 % (see docs/flicker.md), well inside a run's interval.
SUBLEVELS_PER_DECADE = 2


def trapped_name(label: str) -> str:
    """Species name of the occupied traps of one level."""
    return f"trapped:{label}"


def sublevel_count(trap) -> int:
    """Number of sub-levels of a trap level: 1 without a spread, else
    ``ceil(per_decade * spread_decades)`` [count]."""
    decades = float(getattr(trap, "spread_decades", 0.0))
    if decades <= 0.0:
        return 1
    per = int(getattr(trap, "sublevels_per_decade", None) or SUBLEVELS_PER_DECADE)
    return max(1, math.ceil(per * decades - 1e-9))


def sublevel_scales(trap) -> np.ndarray:
    """Rate factors s_j of a level's sub-levels, fastest first [1].

    The D decades below the given coefficients are cut into n equal intervals in log; each
    sub-level sits at the centre (in log) of its interval: ``s_j = 10^(-D (j + 1/2) / n)``.
    Without a spread the single factor is 1.
    """
    n = sublevel_count(trap)
    decades = float(getattr(trap, "spread_decades", 0.0))
    if decades <= 0.0:
        return np.ones(1)
    return 10.0 ** (-decades * (np.arange(n) + 0.5) / n)


def split_evenly(total: int, n: int) -> tuple[int, ...]:
    """``total`` traps over ``n`` equally likely sub-levels at evenly spaced quantiles:
    sub-level j gets ``round((j + 1) total / n) - round(j total / n)`` (rounded dopants)."""
    edges = [_nearest_int(j * total / n) for j in range(n + 1)]
    return tuple(edges[j + 1] - edges[j] for j in range(n))


@dataclass(frozen=True)
class Counts:
    """Integer numbers of dopants and traps in the volume.

    Attributes
    ----------
    donors, acceptors : int  Ionized dopant counts D, A [count]
    traps : tuple of int  T_k per trap level, in scenario order [count]
    split : tuple of tuple of int, optional  The traps of each level over its sub-levels
        (fastest first; sums to T_k), for levels with a spread of time constants; None: each
        level's traps spread evenly over its sub-levels (:meth:`level_split`) [count]
    """

    donors: int
    acceptors: int
    traps: tuple[int, ...] = ()
    split: tuple[tuple[int, ...], ...] | None = None

    def level_split(self, scenario: Scenario) -> tuple[tuple[int, ...], ...]:
        """Traps of each sub-level, per scenario level [count]: ``split`` where given,
        else each level's ``T_k`` spread evenly (:func:`split_evenly`)."""
        if self.split is not None:
            return self.split
        return tuple(split_evenly(total, sublevel_count(trap))
                     for trap, total in zip(scenario.traps, self.traps))


@dataclass(frozen=True)
class Factor:
    """One factor ``sign * x[species] + offset`` of a propensity.

    Attributes
    ----------
    species : int  Index into the state vector
    sign : int  +1 or -1
    exact_offset : float  Offset in the exact propensity
    macro_offset : float  Offset in the macroscopic rate law
    """

    species: int
    sign: int = 1
    exact_offset: float = 0.0
    macro_offset: float = 0.0


@dataclass(frozen=True)
class Channel:
    """One event channel.

    Attributes
    ----------
    name : str  Human-readable name (trap channels start with the trap label)
    coefficient : float  k_r, including the volume factors [s^-1 per product of counts]
    factors : tuple of Factor
    change : tuple of (species index, delta)
    reverse : str or None  Name of the channel that undoes this one (detailed balance pair)
    flow : int  Carriers collected at a contact per event (0 for recombination-generation)
    """

    name: str
    coefficient: float
    factors: tuple[Factor, ...]
    change: tuple[tuple[int, int], ...]
    reverse: str | None = None
    flow: int = 0  # carriers collected at the contact per event (readout current)


def _nearest_int(x: float) -> int:
    return int(math.floor(x + 0.5))


def _emission_densities(scenario: Scenario, trap, kT: float) -> tuple[float, float]:
    """n_1 = n_i exp(E_t / kT) and p_1 = n_i exp(-E_t / kT) [cm^-3] (Shockley & Read, Phys.
    Rev. 87, 835, 1952), refused with the key named where they leave double precision.

    Raises
    ------
    ScenarioError  When n_i exp(|E_t| / kT) > :data:`grmc.scenario.EMISSION_DENSITY_MAX`.
    """
    ni = scenario.material.intrinsic_density_cm3
    exponent = abs(trap.energy_eV) / kT
    if math.log(ni) + exponent > math.log(EMISSION_DENSITY_MAX):
        raise ScenarioError(
            scenario.source, f"traps.{trap.label}", "energy_eV",
            f"n_i exp(|E_t - E_i| / kT) = 10^{(math.log(ni) + exponent) / math.log(10):.0f} "
            f"cm^-3 at {scenario.material.temperature_K:g} K is beyond double precision "
            f"(limit {EMISSION_DENSITY_MAX:.0e}); check the energy, the temperature and n_i "
            "(which falls steeply on cooling)")
    return ni * math.exp(trap.energy_eV / kT), ni * math.exp(-trap.energy_eV / kT)


def nominal_counts(scenario: Scenario) -> Counts:
    """Dopant and trap counts as ``round(density * V)`` (trap counts given directly as is).

    Parameters
    ----------
    scenario : Scenario

    Returns
    -------
    Counts
    """
    vol = scenario.volume.volume_cm3
    mat = scenario.material
    return Counts(
        donors=_nearest_int(mat.donors_cm3 * vol),
        acceptors=_nearest_int(mat.acceptors_cm3 * vol),
        traps=tuple(_nearest_int(m) for m in trap_means(scenario)),
    )


def trap_means(scenario: Scenario) -> tuple[float, ...]:
    """Expected trap count of each level [count] (exact for ``count``, density * V otherwise)."""
    vol = scenario.volume.volume_cm3
    out = []
    for trap in scenario.traps:
        if trap.count is not None:
            out.append(float(trap.count))
        elif trap.density_cm3 is not None:
            out.append(trap.density_cm3 * vol)
        else:
            out.append(trap.areal_density_cm2 * scenario.volume.surface_area_cm2)
    return tuple(out)


def draw_counts(scenario: Scenario, rng: np.random.Generator) -> Counts:
    """Dopant and trap counts of one device drawn from Poisson laws (``dopants = "poisson"``).

    Donors, acceptors and traps given by a density (volume or areal) are Poisson distributed
    with the mean density * V (or areal density * area); traps given by ``count`` keep it.
    On a level with a spread of time constants each trap draws its own sub-level (equally
    likely), so the pixel's traps sit at time constants of their own.

    Parameters
    ----------
    scenario : Scenario
    rng : numpy.random.Generator
        The device's own stream.

    Returns
    -------
    Counts
    """
    vol = scenario.volume.volume_cm3
    mat = scenario.material
    donors = int(rng.poisson(mat.donors_cm3 * vol))
    acceptors = int(rng.poisson(mat.acceptors_cm3 * vol))
    traps, split = [], []
    for trap, mean in zip(scenario.traps, trap_means(scenario)):
        n = sublevel_count(trap)
        if n == 1:
            traps.append(trap.count if trap.count is not None else int(rng.poisson(mean)))
            split.append((traps[-1],))
            continue
        # each trap's rate factor is drawn from the spread: a given count falls on the
        # sub-levels multinomially, a density's Poisson count as independent Poisson counts
        if trap.count is not None:
            sub = rng.multinomial(trap.count, np.full(n, 1.0 / n))
        else:
            sub = rng.poisson(mean / n, size=n)
        split.append(tuple(int(c) for c in sub))
        traps.append(int(sum(split[-1])))
    spread = any(sublevel_count(t) > 1 for t in scenario.traps)
    return Counts(donors=donors, acceptors=acceptors, traps=tuple(traps),
                  split=tuple(split) if spread else None)


@dataclass(frozen=True)
class Model:
    """The stochastic model of one volume: species, channels, charge.

    Attributes
    ----------
    scenario : Scenario
    counts : Counts  Dopant and trap counts used
    species : tuple of str  ``electrons``, ``holes``, ``trapped:<label>``...
    channels : tuple of Channel
    charge : int  The conserved value of ``charge_weights @ x`` [elementary charges]
    level_counts : tuple of int  Traps of each trap species (sub-levels included) [count]
    output_species : tuple of str  Species of the output files: ``electrons``, ``holes``,
        ``trapped:<label>`` per scenario level (a spread level's total), then the sub-levels
        ``trapped:<label>#j`` of spread levels
    level_scales : tuple of float  Rate factor s_j of each trap species (1 without spread) [1]

    Notes
    -----
    The plain arrays (``stoich``, ``coefficient``, ``factor_species``...) are what the engine
    kernels, the continuum and the exact solver take.  They are derived from ``channels`` once.
    """

    scenario: Scenario
    counts: Counts
    species: tuple[str, ...]
    channels: tuple[Channel, ...]
    charge: int
    trap_kinds: tuple[str, ...] = field(default=())
    level_counts: tuple[int, ...] = field(default=())  # traps of each trap species [count]
    output_species: tuple[str, ...] = field(default=())
    level_scales: tuple[float, ...] = field(default=())  # rate factor of each trap species

    # ---------------------------------------------------------------- sizes and names
    @property
    def volume_cm3(self) -> float:
        """Volume V [cm^3]."""
        return self.scenario.volume.volume_cm3

    @property
    def n_species(self) -> int:
        return len(self.species)

    @property
    def n_channels(self) -> int:
        return len(self.channels)

    @property
    def channel_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.channels)

    # ---------------------------------------------------------------- plain arrays
    @cached_property
    def stoich(self) -> np.ndarray:
        """Stoichiometry matrix nu, shape (channels, species) [count]."""
        nu = np.zeros((self.n_channels, self.n_species), dtype=np.int64)
        for r, ch in enumerate(self.channels):
            for s, d in ch.change:
                nu[r, s] += d
        nu.setflags(write=False)
        return nu

    @cached_property
    def coefficient(self) -> np.ndarray:
        """k_r of each channel, shape (channels,) [s^-1 per product of counts]."""
        out = np.array([c.coefficient for c in self.channels], dtype=np.float64)
        out.setflags(write=False)
        return out

    def _factor_table(self, attr: str, fill, dtype) -> np.ndarray:
        out = np.full((self.n_channels, MAX_FACTORS), fill, dtype=dtype)
        for r, ch in enumerate(self.channels):
            for f, fac in enumerate(ch.factors):
                out[r, f] = getattr(fac, attr)
        out.setflags(write=False)
        return out

    @cached_property
    def factor_species(self) -> np.ndarray:
        """Species index of each factor, -1 where unused; shape (channels, 3)."""
        return self._factor_table("species", -1, np.int64)

    @cached_property
    def factor_sign(self) -> np.ndarray:
        """Sign of each factor (0 where unused); shape (channels, 3)."""
        return self._factor_table("sign", 0.0, np.float64)

    @cached_property
    def factor_offset_exact(self) -> np.ndarray:
        """Offset of each factor in the exact propensity (1 where unused); (channels, 3)."""
        return self._factor_table("exact_offset", 1.0, np.float64)

    @cached_property
    def factor_offset_macro(self) -> np.ndarray:
        """Offset of each factor in the macroscopic law (1 where unused); (channels, 3)."""
        return self._factor_table("macro_offset", 1.0, np.float64)

    @cached_property
    def flow_weight(self) -> np.ndarray:
        """Carriers collected per event of each channel, shape (channels,) [count]."""
        out = np.array([c.flow for c in self.channels], dtype=np.int64)
        out.setflags(write=False)
        return out

    @cached_property
    def charge_weights(self) -> np.ndarray:
        """w with ``w @ x == charge`` for every reachable state: +1 e, -1 h, +1 per trapped e."""
        w = np.ones(self.n_species, dtype=np.int64)
        w[1] = -1
        w.setflags(write=False)
        return w

    @cached_property
    def capacity(self) -> np.ndarray:
        """Upper bound of each species (-1: unbounded; T_k for trapped electrons) [count]."""
        cap = np.full(self.n_species, -1, dtype=np.int64)
        cap[2:] = self.level_counts
        cap.setflags(write=False)
        return cap

    @cached_property
    def output_matrix(self) -> np.ndarray:
        """P with ``x_out = P @ x``: the output species as sums of the model's species, shape
        (output species, species) [1].  The identity when no level has a spread."""
        P = np.zeros((len(self.output_species), self.n_species))
        index = {name: i for i, name in enumerate(self.species)}
        for o, name in enumerate(self.output_species):
            if name in index:
                P[o, index[name]] = 1.0
            else:  # a spread level's total: the sum of its sub-levels
                for i, sp in enumerate(self.species):
                    if sp.startswith(name + "#"):
                        P[o, i] = 1.0
        P.setflags(write=False)
        return P

    @property
    def has_sublevels(self) -> bool:
        """True when some trap level is split into sub-levels (outputs differ from species)."""
        return tuple(self.output_species) != tuple(self.species)

    def project(self, x: np.ndarray) -> np.ndarray:
        """Counts (species along the LAST axis) as output species, ``x @ P^T`` [count]."""
        x = np.asarray(x)
        return x if not self.has_sublevels else x @ self.output_matrix.T

    def project_matrix(self, m: np.ndarray) -> np.ndarray:
        """A (species, species, ...) covariance or spectral matrix as output species,
        ``P m P^T`` along the first two axes."""
        m = np.asarray(m)
        if not self.has_sublevels:
            return m
        P = self.output_matrix
        return np.einsum("ai,ij...,bj->ab...", P, m, P)

    @cached_property
    def reverse_pairs(self) -> tuple[tuple[int, int], ...]:
        """Index pairs (forward, reverse) of channels that undo each other."""
        index = {c.name: i for i, c in enumerate(self.channels)}
        pairs = []
        for i, c in enumerate(self.channels):
            if c.reverse is not None and c.reverse in index and i < index[c.reverse]:
                pairs.append((i, index[c.reverse]))
        return tuple(pairs)

    @cached_property
    def dependency(self) -> tuple[np.ndarray, np.ndarray]:
        """Channels whose propensity an event of each channel changes, in CSR form.

        Returns
        -------
        indptr : ndarray, shape (channels + 1,)
        indices : ndarray  Channel indices; channel r's dependents are
            ``indices[indptr[r]:indptr[r + 1]]``.
        """
        changed = [set(np.nonzero(self.stoich[r])[0]) for r in range(self.n_channels)]
        reads = [
            {f.species for f in ch.factors} for ch in self.channels
        ]
        indptr = [0]
        indices: list[int] = []
        for r in range(self.n_channels):
            dep = [q for q in range(self.n_channels) if reads[q] & changed[r]]
            indices.extend(dep)
            indptr.append(len(indices))
        return np.array(indptr, dtype=np.int64), np.array(indices, dtype=np.int64)

    # ---------------------------------------------------------------- laws
    def _laws(self, x: np.ndarray, offsets: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        fs = self.factor_species
        vals = self.factor_sign * x[..., np.maximum(fs, 0)] + offsets
        vals = np.where(fs >= 0, vals, 1.0)
        return self.coefficient * np.prod(vals, axis=-1)

    def propensities(self, x: np.ndarray) -> np.ndarray:
        """Exact propensities a_r(x) [events/s] of an integer state (or a stack of states).

        Parameters
        ----------
        x : array_like, shape (..., species)  Counts [count]

        Returns
        -------
        ndarray, shape (..., channels)
        """
        x = np.asarray(x, dtype=np.float64)
        return self._laws(x, self.factor_offset_exact)

    def rates(self, x: np.ndarray) -> np.ndarray:
        """Macroscopic rate laws w_r(x) [events/s] at mean counts x (real valued).

        Parameters
        ----------
        x : array_like, shape (..., species)  Mean counts [count]

        Returns
        -------
        ndarray, shape (..., channels)
        """
        x = np.asarray(x, dtype=np.float64)
        return self._laws(x, self.factor_offset_macro)

    def rate_jacobian(self, x: np.ndarray) -> np.ndarray:
        """d w_r / d x_s of the macroscopic laws, shape (channels, species) [s^-1]."""
        x = np.asarray(x, dtype=np.float64)
        fs, sg, off = self.factor_species, self.factor_sign, self.factor_offset_macro
        vals = np.where(fs >= 0, sg * x[np.maximum(fs, 0)] + off, 1.0)
        jac = np.zeros((self.n_channels, self.n_species))
        for r in range(self.n_channels):
            for f in range(MAX_FACTORS):
                s = fs[r, f]
                if s < 0:
                    continue
                others = np.prod(np.delete(vals[r], f))
                jac[r, s] += self.coefficient[r] * sg[r, f] * others
        return jac

    def drift(self, x: np.ndarray) -> np.ndarray:
        """Right-hand side of the rate equations d<x>/dt = nu^T w(<x>) [count/s]."""
        return self.rates(x) @ self.stoich

    # ---------------------------------------------------------------- states
    def charge_of(self, x: np.ndarray) -> float:
        """``charge_weights @ x`` [elementary charges]."""
        return float(np.asarray(x, dtype=np.float64) @ self.charge_weights)

    def nearest_neutral_state(self, x: np.ndarray) -> np.ndarray:
        """The integer state of the right charge nearest to real-valued mean counts ``x``.

        Trap occupancies are rounded and kept within [0, T_k]; then electrons and holes are
        chosen with N_e - N_h fixed by the charge, nearest to (x_e, x_h) and not negative.

        Parameters
        ----------
        x : array_like, shape (species,)  Mean counts [count]

        Returns
        -------
        ndarray of int64, shape (species,)
        """
        x = np.asarray(x, dtype=np.float64)
        out = np.zeros(self.n_species, dtype=np.int64)
        for k, total in enumerate(self.level_counts):
            out[2 + k] = min(max(_nearest_int(x[2 + k]), 0), total)
        d = self.charge - int(out[2:].sum())  # N_e - N_h
        e = _nearest_int(0.5 * (x[0] + x[1] + d))
        e = max(e, d, 0)
        out[0], out[1] = e, e - d
        return out

    def counts_without_trap(self, level: int) -> Counts:
        """This device's counts with one trap fewer in trap species ``level`` (index among
        the trap species, sub-levels counted), e.g. to see what one single trap adds."""
        split = [list(sub) for sub in self.counts.level_split(self.scenario)]
        flat = [(k, j) for k, sub in enumerate(split) for j in range(len(sub))]
        k, j = flat[level]
        split[k][j] -= 1
        traps = tuple(sum(sub) for sub in split)
        if self.counts.split is None and all(len(sub) == 1 for sub in split):
            return replace(self.counts, traps=traps)
        return replace(self.counts, traps=traps, split=tuple(tuple(sub) for sub in split))

    def with_counts(self, counts: Counts) -> Model:
        """The same scenario with other dopant and trap counts (one device of a population)."""
        return build_model(self.scenario, counts=counts)

    @property
    def modulation(self) -> tuple[int, int, float, float, float] | None:
        """The modulated optical channel, as the engine takes it, or None.

        Returns
        -------
        (channel index, kind (1 sine, 2 square), frequency [Hz], depth [1], phase [rad])
        or None for steady light, no light, or no optical channel.  The channel's
        coefficient is the MEAN generation rate; the engine multiplies it by h(t) with
        mean 1 (exact by thinning).
        """
        light = self.scenario.light
        if not light.modulated or "optical generation" not in self.channel_names:
            return None
        kind = 1 if light.waveform == "sine" else 2
        return (self.channel_names.index("optical generation"), kind,
                float(light.modulation_frequency_Hz), float(light.modulation_depth), 0.0)

    def describe(self) -> list[dict]:
        """One dict per channel: name, coefficient and change, for tables and tests."""
        return [
            {"name": c.name, "coefficient": c.coefficient,
             "change": {self.species[s]: d for s, d in c.change}}
            for c in self.channels
        ]


def build_model(scenario: Scenario, *, counts: Counts | None = None,
                check_type: bool = True) -> Model:
    """Build the model of a scenario.

    Parameters
    ----------
    scenario : Scenario
    counts : Counts, optional
        Dopant and trap counts; default :func:`nominal_counts` (rounded densities).
    check_type : bool
        Refuse a ``[reservoir]`` exchange in a volume without a definite type (default);
        False only to list the channel names of a population.

    Raises
    ------
    ScenarioError
        ``[reservoir] carrier`` when the exchanged kind could outnumber the other.

    Returns
    -------
    Model
    """
    if counts is None:
        counts = nominal_counts(scenario)
    mat = scenario.material
    vol = scenario.volume.volume_cm3
    ni = mat.intrinsic_density_cm3
    kT = BOLTZMANN_EV_K * mat.temperature_K
    E, H = 0, 1
    levels = _levels(scenario, counts)
    species = [ELECTRONS, HOLES] + [lv[0] for lv in levels]
    outputs = [ELECTRONS, HOLES] + [trapped_name(t.label) for t in scenario.traps]
    outputs += [name for name in species[2:] if name not in outputs]
    pair_up = ((E, +1), (H, +1))
    pair_down = ((E, -1), (H, -1))
    ch: list[Channel] = []

    def add(name, coefficient, factors, change, reverse=None, flow=0):
        if coefficient > 0.0:
            ch.append(Channel(name, float(coefficient), tuple(factors), change, reverse, flow))

    B = mat.radiative_cm3_s
    add("thermal generation", B * ni * ni * vol, (), pair_up, "radiative recombination")
    add("radiative recombination", B / vol, (Factor(E), Factor(H)), pair_down,
        "thermal generation")
    if scenario.light.waveform != "off":  # steady, or the mean of a modulated waveform
        add("optical generation", scenario.light.generation_cm3_s * vol, (), pair_up)
    Cn = mat.auger_electron_cm6_s
    add("Auger eeh", Cn / vol**2, (Factor(E), Factor(E, 1, -1.0, 0.0), Factor(H)), pair_down,
        "impact generation (e)")
    add("impact generation (e)", Cn * ni * ni, (Factor(E),), pair_up, "Auger eeh")
    Cp = mat.auger_hole_cm6_s
    add("Auger ehh", Cp / vol**2, (Factor(E), Factor(H), Factor(H, 1, -1.0, 0.0)), pair_down,
        "impact generation (h)")
    add("impact generation (h)", Cp * ni * ni, (Factor(H),), pair_up, "Auger ehh")

    donor_traps = _add_trap_channels(add, scenario, levels, kT, vol)
    readout = scenario.readout
    reservoir = scenario.reservoir
    events = readout is not None and readout.collection == "events"
    exchanged = None if reservoir is None else reservoir.carrier
    if events and reservoir is None:
        # a photoconductor bar with ohmic contacts: a carrier drifting out through its
        # collecting contact is replaced through the other one, so the counts (and
        # neutrality) are unchanged; the event is one collected carrier of the readout
        # current.  With a reservoir the collecting boundary is the junction to it instead.
        t_n, t_p = readout.transit_times()
        add("electrons collected", 1.0 / t_n, (Factor(E),), (), flow=1)
        add("holes collected", 1.0 / t_p, (Factor(H),), (), flow=1)
    charge = counts.donors - counts.acceptors + donor_traps
    if reservoir is not None:
        if check_type:
            _check_definite_type(scenario, counts, charge)
        c = E if exchanged == ELECTRONS else H
        t_x = reservoir.exchange_time(readout)
        # the contact withdraws / supplies a carrier of the other kind with each exchange,
        # so the volume stays neutral: a pair leaves or enters
        add(f"{exchanged} swept out", 1.0 / t_x, (Factor(c),), pair_down,
            f"{exchanged} from reservoir", flow=1 if events else 0)
        add(f"{exchanged} from reservoir", reservoir.density_cm3 * vol / t_x, (), pair_up,
            f"{exchanged} swept out", flow=-1 if events else 0)
    return Model(
        scenario=scenario,
        counts=counts,
        species=tuple(species),
        channels=tuple(ch),
        charge=int(charge),
        trap_kinds=tuple(lv[1].kind for lv in levels),
        level_counts=tuple(lv[3] for lv in levels),
        output_species=tuple(outputs),
        level_scales=tuple(lv[2] for lv in levels),
    )


def _add_trap_channels(add, scenario: Scenario, levels, kT: float, vol: float) -> int:
    """The four SRH channels of every trap species (a level, or a sub-level of a spread
    level, whose capture and emission are scaled together; scale 1 without a spread).

    Returns
    -------
    int  Traps of donor-like levels (they enter the conserved charge) [count]
    """
    E, H = 0, 1
    donor_traps = 0
    for k, (name, trap, scale, total) in enumerate(levels):
        M = 2 + k
        if total <= 0:
            continue
        if trap.kind == "donor":
            donor_traps += total
        n1, p1 = _emission_densities(scenario, trap, kT)
        cn, cp = trap.electron_capture_cm3_s * scale, trap.hole_capture_cm3_s * scale
        empty = Factor(M, -1, float(total), float(total))
        lab = name[len("trapped:"):]
        add(f"{lab}: electron capture", cn / vol, (Factor(E), empty), ((E, -1), (M, +1)),
            f"{lab}: electron emission")
        add(f"{lab}: electron emission", cn * n1, (Factor(M),), ((E, +1), (M, -1)),
            f"{lab}: electron capture")
        add(f"{lab}: hole capture", cp / vol, (Factor(H), Factor(M)), ((H, -1), (M, -1)),
            f"{lab}: hole emission")
        add(f"{lab}: hole emission", cp * p1, (empty,), ((H, +1), (M, +1)),
            f"{lab}: hole capture")
    return donor_traps


def _levels(scenario: Scenario, counts: Counts) -> list[tuple[str, object, float, int]]:
    """The trap species of a model: (species name, scenario trap, rate factor, traps) for
    each level, a spread level's sub-levels in its place (fastest first)."""
    out = []
    for trap, sub in zip(scenario.traps, counts.level_split(scenario)):
        if sublevel_count(trap) == 1:
            out.append((trapped_name(trap.label), trap, 1.0, int(sum(sub))))
            continue
        for j, (scale, total) in enumerate(zip(sublevel_scales(trap), sub)):
            out.append((f"{trapped_name(trap.label)}#{j}", trap, float(scale), int(total)))
    return out


def with_every_trap(scenario: Scenario, counts: Counts) -> Counts:
    """Counts with at least one trap in every level and sub-level: a model with every
    channel a population of devices can have (for the channel names of a run)."""
    split = tuple(tuple(max(c, 1) for c in sub) for sub in counts.level_split(scenario))
    return replace(counts, traps=tuple(sum(sub) for sub in split),
                   split=None if counts.split is None and not any(
                       sublevel_count(t) > 1 for t in scenario.traps) else split)


def _check_definite_type(scenario: Scenario, counts: Counts, charge: int) -> None:
    """Refuse a reservoir exchange of pairs when the other kind can run out.

    A pair leaves with each exchanged carrier, so the other kind must outnumber the exchanged
    kind in every reachable state.  With ``N_e - N_h = charge - sum_k M_k`` and
    ``0 <= M_k <= T_k`` that holds exactly when the volume is n-type (holes exchanged:
    ``charge - sum T_k >= 0``) or p-type (electrons exchanged: ``charge <= 0``) in every trap
    configuration.
    """
    carrier = scenario.reservoir.carrier
    excess = charge - sum(counts.traps) if carrier == HOLES else -charge
    if excess >= 0:
        return
    other = "n" if carrier == HOLES else "p"
    raise ScenarioError(
        scenario.source, "reservoir", "carrier",
        f"exchanging {carrier} moves a pair each time, which needs an {other}-type volume in "
        f"every trap configuration; with {counts.donors} donors, {counts.acceptors} acceptors "
        f"and {sum(counts.traps)} trap sites the {carrier} can outnumber the other kind by "
        f"{-excess} (more {'donors' if other == 'n' else 'acceptors'} or fewer traps needed)")


def with_light_off(model: Model) -> Model:
    """The same model in the dark (used for equilibrium references)."""
    scen = replace(model.scenario, light=replace(model.scenario.light, waveform="off"))
    return build_model(scen, counts=model.counts)
