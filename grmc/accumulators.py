"""Accumulators: one per observable, each with ``add``, ``merge`` and ``variables``.

A trajectory is first turned into an :class:`Observation` (its periodograms and readout
current computed once), then every accumulator of the run folds it in with ``add``.  Chunks
of trajectories are reduced into their own :class:`Accumulators` and merged in chunk order,
so the floating-point sums depend only on the chunk boundaries, never on which worker, thread
or process reduced a chunk.  Every accumulator is plain data (numpy arrays, dicts, lists) and
pickles.  ``variables(plan)`` returns the accumulator's output variables under the names of
:data:`grmc.dataset.VARIABLES`, as ``name: (dims, values)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np

from . import spectra
from .model import ELEMENTARY_CHARGE_C
from .plan import N_BATCHES, OVERSAMPLE, Plan, Prepared

__all__ = ["Observation", "observe", "Accumulators", "Moments", "Events", "CountSpectrum",
           "CurrentSpectrum", "Histogram", "Stationary", "DriveResponse", "Pixels",
           "MAX_HISTOGRAM_SPAN"]

#: Largest span of count values kept in the stationary histogram.
MAX_HISTOGRAM_SPAN = 4096


@dataclass
class Observation:
    """One trajectory with what several accumulators need computed once.

    Attributes
    ----------
    index : int  Trajectory index
    res : engine result  samples, bins, integ, integ2, events, final, flows
    prep : Prepared  The trajectory's device
    pxx : ndarray (S, F)  Count periodogram [count^2/Hz]
    i_bins : ndarray or None  Readout current per fine bin [A]
    pii : ndarray or None  Current periodogram [A^2/Hz]
    group : int or None  Jackknife group
    """

    index: int
    res: object
    prep: Prepared
    pxx: np.ndarray
    i_bins: np.ndarray | None
    pii: np.ndarray | None
    group: int | None


def current_bins(res, dt_fine: float, a_e: float, a_h: float) -> np.ndarray:
    """The readout current averaged over each fine bin [A]: from the collection events where
    the engine recorded them (shot noise included), else from the counts."""
    if res.flows.size:
        return res.flows * (ELEMENTARY_CHARGE_C / dt_fine)
    return a_e * res.bins[:, 0] + a_h * res.bins[:, 1]


def observe(plan: Plan, i: int, res, prep: Prepared) -> Observation:
    """Periodograms and readout current of trajectory ``i`` (computed once)."""
    _, pxx = spectra.periodogram(res.bins, plan.dt_fine, oversample=OVERSAMPLE,
                                 segments=plan.segments)
    i_bins = pii = None
    if plan.current:
        i_bins = current_bins(res, plan.dt_fine, plan.a_e, plan.a_h)
        _, pii = spectra.periodogram(i_bins, plan.dt_fine, oversample=OVERSAMPLE,
                                     segments=plan.segments)
    return Observation(i, res, prep, pxx, i_bins, pii, plan.group(i))


def _add(a, b):
    """Sum where ``a`` may be None (the first term is kept as it is)."""
    return b if a is None else a + b


def _add_groups(mine: dict, theirs: dict) -> None:
    for g, val in theirs.items():
        mine[g] = mine[g] + val if g in mine else val


@dataclass
class Moments:
    """Ensemble mean and variance at each sample time (sums shifted by the start state)."""

    n: int = 0
    sum_x: np.ndarray | None = None
    sum_x2: np.ndarray | None = None

    def add(self, ob: Observation, plan: Plan) -> None:
        x = ob.res.samples.astype(np.float64) - plan.ref
        if self.n == 0:
            self.sum_x = np.zeros_like(x)
            self.sum_x2 = np.zeros_like(x)
        self.n += 1
        self.sum_x += x
        self.sum_x2 += x * x

    def merge(self, other: Moments) -> None:
        if other.n == 0:
            return
        if self.n == 0:
            self.n, self.sum_x, self.sum_x2 = other.n, other.sum_x, other.sum_x2
            return
        self.n += other.n
        self.sum_x = self.sum_x + other.sum_x
        self.sum_x2 = self.sum_x2 + other.sum_x2

    def variables(self, plan: Plan) -> dict:
        n = self.n
        mean_t = self.sum_x / n + plan.ref
        var_t = (((self.sum_x2 - self.sum_x**2 / n) / (n - 1)) if n > 1
                 else np.full_like(mean_t, np.nan))
        return {"count_mean": (("species", "t"), mean_t.T),
                "count_var": (("species", "t"), var_t.T)}


@dataclass
class Events:
    """Events per channel of the full channel list, and all events together."""

    events: np.ndarray | None = None
    n_events: int = 0
    n: int = 0

    def add(self, ob: Observation, plan: Plan) -> None:
        if self.events is None:
            self.events = np.zeros(len(plan.names), dtype=np.int64)
        np.add.at(self.events, ob.prep.channel_map, ob.res.events)
        self.n_events += int(ob.res.events.sum())
        self.n += 1

    def merge(self, other: Events) -> None:
        if other.events is None:
            return
        self.events = other.events if self.events is None else self.events + other.events
        self.n_events += other.n_events
        self.n += other.n

    def variables(self, plan: Plan) -> dict:
        return {"events": (("channel",), self.events),
                "event_rate": (("channel",),
                               self.events / (self.n * plan.run.duration_s))}


@dataclass
class _Spectrum:
    """Sum of periodograms and of each jackknife group's periodograms."""

    n: int = 0
    psd: np.ndarray | None = None
    groups: dict = field(default_factory=dict)  # jackknife group -> (sum, count)

    def _fold(self, p: np.ndarray, group: int | None) -> None:
        self.n += 1
        self.psd = _add(self.psd, p)
        if group is not None:
            self.groups[group] = self.groups[group] + p if group in self.groups else p

    def merge(self, other: _Spectrum) -> None:
        if other.n == 0:
            return
        self.n += other.n
        self.psd = _add(self.psd, other.psd)
        _add_groups(self.groups, other.groups)

    def mean(self) -> np.ndarray:
        """Mean periodogram [unit^2/Hz]."""
        return self.psd / self.n

    def segments(self, plan: Plan) -> int:
        """Averaged segments in all, K [1]."""
        return self.n * plan.segments

    def interval(self, plan: Plan) -> tuple[np.ndarray, np.ndarray]:
        """95 % chi-squared interval of the mean periodogram (Welch 1967)."""
        return spectra.welch_interval(self.mean(), self.segments(plan))

    def group_means(self, plan: Plan) -> np.ndarray | None:
        """Mean periodograms of the jackknife groups, or None with fewer than 8 groups."""
        if len(self.groups) < 8 or not plan.jackknife:
            return None
        size = self.n // plan.jackknife
        return np.array([self.groups[g] / size for g in sorted(self.groups)])


@dataclass
class CountSpectrum(_Spectrum):
    """Averaged periodogram of every count, with jackknife group sums."""

    def add(self, ob: Observation, plan: Plan) -> None:
        self._fold(ob.pxx, ob.group)

    def variables(self, plan: Plan) -> dict:
        low, high = self.interval(plan)
        return {"psd": (("species", "frequency"), self.mean()),
                "psd_low": (("species", "frequency"), low),
                "psd_high": (("species", "frequency"), high)}


@dataclass
class CurrentSpectrum(_Spectrum):
    """Averaged periodogram of the readout current and the charge it carried."""

    charge: float = 0.0  # all trajectories [C]

    def add(self, ob: Observation, plan: Plan) -> None:
        self.charge += float(ob.i_bins.sum()) * plan.dt_fine
        self._fold(ob.pii, ob.group)

    def merge(self, other: CurrentSpectrum) -> None:
        if other.n == 0:
            return
        self.charge = other.charge if self.n == 0 else self.charge + other.charge
        super().merge(other)

    def variables(self, plan: Plan) -> dict:
        low, high = self.interval(plan)
        return {"current_mean": ((), self.charge / (self.n * plan.run.duration_s)),
                "current_psd": (("frequency",), self.mean()),
                "current_psd_low": (("frequency",), low),
                "current_psd_high": (("frequency",), high)}


def _add_hist(a, b):
    lo = min(a[0], b[0])
    hi = max(a[0] + len(a[1]), b[0] + len(b[1]))
    out = np.zeros(hi - lo, dtype=np.int64)
    out[a[0] - lo:a[0] - lo + len(a[1])] += a[1]
    out[b[0] - lo:b[0] - lo + len(b[1])] += b[1]
    return lo, out


@dataclass
class Histogram:
    """Counts of every sampled value per species: species -> (lowest value, counts)."""

    hist: dict = field(default_factory=dict)

    def add(self, ob: Observation, plan: Plan) -> None:
        samples = ob.res.samples
        for s in range(samples.shape[1]):
            col = samples[:, s]
            lo = int(col.min())
            h = np.bincount(col - lo)
            prev = self.hist.get(s)
            self.hist[s] = (lo, h) if prev is None else _add_hist(prev, (lo, h))

    def merge(self, other: Histogram) -> None:
        for s, h in other.hist.items():
            self.hist[s] = _add_hist(self.hist[s], h) if s in self.hist else h

    def variables(self, plan: Plan) -> tuple[dict, dict]:
        """Common count axis and probabilities per species (variables, coordinates).

        Species are taken in order (electrons, holes, traps) while the union of their
        observed ranges stays within :data:`MAX_HISTOGRAM_SPAN` values; a species whose range
        would make the axis too wide (e.g. 1e5 majority holes beside 10 electrons) gets a
        NaN row.
        """
        n_species = len(plan.species)
        if not self.hist:
            return {}, {}
        lo = hi = None
        kept = []
        for s in range(n_species):
            start, counts = self.hist[s]
            new_lo = start if lo is None else min(lo, start)
            new_hi = start + len(counts) if hi is None else max(hi, start + len(counts))
            if new_hi - new_lo <= MAX_HISTOGRAM_SPAN:
                lo, hi = new_lo, new_hi
                kept.append(s)
        if not kept:
            return {}, {}
        probs = np.full((n_species, hi - lo), np.nan)
        for s in kept:
            start, counts = self.hist[s]
            probs[s] = 0.0
            probs[s, start - lo:start - lo + len(counts)] = counts / counts.sum()
        return ({"count_histogram": (("species", "count_value"), probs)},
                {"count_value": ("count_value", np.arange(lo, hi, dtype=np.int64))})


@dataclass
class Stationary:
    """Per-trajectory time averages: (index, mean, mean square, batch means, counts)."""

    rows: list = field(default_factory=list)

    def add(self, ob: Observation, plan: Plan) -> None:
        res = ob.res
        duration = plan.dt_fine * res.bins.shape[0]
        batches = np.array([b.mean(axis=0) for b in np.array_split(res.bins, N_BATCHES)])
        self.rows.append((ob.index, res.integ / duration, res.integ2 / duration, batches,
                          ob.prep.model.counts))

    def merge(self, other: Stationary) -> None:
        self.rows.extend(other.rows)

    def sorted_rows(self) -> list:
        return sorted(self.rows, key=lambda row: row[0])

    def variables(self, plan: Plan) -> dict:
        """Stationary mean and variance with standard errors that honour autocorrelation."""
        rows = self.sorted_rows()
        n = len(rows)
        tmean = np.array([row[1] for row in rows])
        tmsq = np.array([row[2] for row in rows])
        st_mean = tmean.mean(axis=0)
        st_var = np.maximum(tmsq.mean(axis=0) - st_mean**2, 0.0)  # rounding can dip below 0
        per_var = tmsq - 2.0 * st_mean * tmean + st_mean**2  # each trajectory's about the pool
        if n > 1:
            st_err = tmean.std(axis=0, ddof=1) / np.sqrt(n)
            var_err = per_var.std(axis=0, ddof=1) / np.sqrt(n)
        else:
            batches = rows[0][3]
            st_err = batches.std(axis=0, ddof=1) / np.sqrt(len(batches))
            var_err = np.full(st_mean.shape, np.nan)
        return {
            "stationary_mean": (("species",), st_mean),
            "stationary_mean_stderr": (("species",), st_err),
            "stationary_var": (("species",), st_var),
            "stationary_var_stderr": (("species",), var_err),
            "trajectory_mean": (("realization", "species"), tmean),
        }

    def device_variables(self, plan: Plan) -> tuple[dict, dict]:
        """Each trajectory's drawn dopant and trap counts (``dopants = "poisson"``)."""
        cnt = [row[4] for row in self.sorted_rows()]
        data = {"donors": (("realization",), np.array([c.donors for c in cnt], dtype=np.int64)),
                "acceptors": (("realization",), np.array([c.acceptors for c in cnt],
                                                         dtype=np.int64))}
        coords = {}
        traps = plan.scenario.traps
        if traps:
            data["trap_count"] = (("realization", "trap_level"),
                                  np.array([c.traps for c in cnt], dtype=np.int64))
            coords["trap_level"] = ("trap_level", np.array([tr.label for tr in traps],
                                                           dtype=object))
        return data, coords


@dataclass
class DriveResponse:
    """Lock-in quadratures at the drive frequency: (index, counts' (2, S), current's (2,))."""

    rows: list = field(default_factory=list)

    def add(self, ob: Observation, plan: Plan) -> None:
        freq = ob.prep.model.modulation[2]
        q = spectra.drive_quadratures(ob.res.bins, plan.dt_fine, freq)
        qi = (spectra.drive_quadratures(ob.i_bins, plan.dt_fine, freq) if plan.current
              else None)
        self.rows.append((ob.index, q, qi))

    def merge(self, other: DriveResponse) -> None:
        self.rows.extend(other.rows)

    def quadratures(self) -> tuple[np.ndarray, np.ndarray | None]:
        rows = sorted(self.rows, key=lambda row: row[0])
        q = np.array([row[1] for row in rows])
        qi = np.array([row[2] for row in rows]) if rows and rows[0][2] is not None else None
        return q, qi


@dataclass
class Pixels:
    """Each pixel's mean readout and banded readout spectrum: (index, mean, banded)."""

    rows: list = field(default_factory=list)

    def add(self, ob: Observation, plan: Plan) -> None:
        if plan.current:
            self.rows.append((ob.index, float(ob.i_bins.mean()), plan.bands.average(ob.pii)))
        else:
            self.rows.append((ob.index, float(ob.res.bins[:, 0].mean()),
                              plan.bands.average(ob.pxx[0])))

    def merge(self, other: Pixels) -> None:
        self.rows.extend(other.rows)

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        rows = sorted(self.rows, key=lambda row: row[0])
        return np.array([row[1] for row in rows]), np.array([row[2] for row in rows])


@dataclass
class Accumulators:
    """Every accumulator of a run (None where the scenario has no such observable)."""

    moments: Moments = field(default_factory=Moments)
    events: Events = field(default_factory=Events)
    stationary: Stationary = field(default_factory=Stationary)
    histogram: Histogram = field(default_factory=Histogram)
    count_spectrum: CountSpectrum = field(default_factory=CountSpectrum)
    current_spectrum: CurrentSpectrum | None = None
    drive: DriveResponse | None = None
    pixels: Pixels | None = None

    @classmethod
    def for_plan(cls, plan: Plan) -> Accumulators:
        """Empty accumulators for the observables of ``plan``."""
        return cls(current_spectrum=CurrentSpectrum() if plan.current else None,
                   drive=DriveResponse() if plan.base.model.modulation is not None else None,
                   pixels=Pixels() if plan.bands is not None else None)

    def _each(self):
        for f in fields(self):
            acc = getattr(self, f.name)
            if acc is not None:
                yield f.name, acc

    @property
    def n(self) -> int:
        """Trajectories folded in."""
        return self.moments.n

    def add(self, ob: Observation, plan: Plan) -> None:
        """Fold one observed trajectory into every accumulator."""
        for _, acc in self._each():
            acc.add(ob, plan)

    def merge(self, other: Accumulators) -> Accumulators:
        """Fold ``other`` (the next chunk in order) into these; returns self."""
        for name, acc in self._each():
            theirs = getattr(other, name)
            if theirs is not None:
                acc.merge(theirs)
        return self
