"""Variables derived from the merged accumulators and the theory: the one place to add more.

Each function of :data:`DERIVED` takes ``(plan, acc, data)`` -- the plan, the merged
:class:`grmc.accumulators.Accumulators` and the variables assembled so far (simulated and
theory, ``name: (dims, values)``) -- and returns ``(variables, coordinates)`` to add.  They
run in order, so a later one may read what an earlier one added.  A new derived quantity is
one more function and one more line in :data:`DERIVED`.
"""

from __future__ import annotations

import numpy as np

from . import flicker, population, spectra, spread
from .accumulators import Accumulators
from .bands import band_average
from .model import ELEMENTARY_CHARGE_C
from .plan import Plan

__all__ = ["DERIVED", "derive", "flicker_band"]


def _fit_vars(fits, *, prefix: str, species_dim: bool) -> dict:
    """Lorentzian components (up to two, ascending corner) as data variables; NaN where a
    component was not resolved."""
    n_comp = 2
    shape = (len(fits), n_comp)
    vals = {k: np.full(shape, np.nan) for k in ("S0", "S0_err", "f_c", "f_c_err", "tau",
                                                 "tau_err")}
    for i, fit in enumerate(fits):
        for j, comp in enumerate(fit.components[:n_comp]):
            for k in vals:
                vals[k][i, j] = getattr(comp, k)
    kinds = np.array([f.kind for f in fits], dtype=object)
    dims = ("species", "component") if species_dim else ("component",)

    def pick(a):
        return a if species_dim else a[0]

    return {
        f"{prefix}plateau": (dims, pick(vals["S0"])),
        f"{prefix}plateau_stderr": (dims, pick(vals["S0_err"])),
        f"{prefix}corner_frequency": (dims, pick(vals["f_c"])),
        f"{prefix}corner_frequency_stderr": (dims, pick(vals["f_c_err"])),
        f"{prefix}tau_spectrum": (dims, pick(vals["tau"])),
        f"{prefix}tau_spectrum_stderr": (dims, pick(vals["tau_err"])),
        f"{prefix}spectrum_kind": (dims[:-1], kinds if species_dim else kinds[0]),
    }


def _drive_Hz(plan: Plan) -> float | None:
    """The drive frequency of modulated light (its line and harmonics are left out of the
    Lorentzian fits), or None [Hz]."""
    light = plan.scenario.light
    return light.modulation_frequency_Hz if light.modulated else None


def count_fits(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Lorentzian fits of every count spectrum, jackknife errors over trajectory groups.

    The sub-levels of a spread trap level are not analysed (their Lorentzians are known from
    the linear-noise answer; :func:`grmc.spread.not_analysed`): the level's total is.
    """
    spec = acc.count_spectrum
    freqs = plan.frequencies
    psd, (low, high) = spec.mean(), spec.interval(plan)
    groups = spec.group_means(plan)
    fits = [spectra.analyse_spectrum(freqs, psd[s], low[s], high[s], spec.segments(plan),
                                     batches=None if groups is None else groups[:, s],
                                     drive_Hz=_drive_Hz(plan))
            if not spread.is_sublevel(name) else spread.not_analysed(spec.segments(plan))
            for s, name in enumerate(plan.species)]
    return _fit_vars(fits, prefix="", species_dim=True), {}


def current_fits(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Shot level of the collection events and the Lorentzian fit of the current's G-R part.

    With collection events the spectrum sits on the white shot noise of the crossings,
    2 q^2 sum_r flow_r^2 (events_r per second) = 2 q (I_out + I_in) (Schottky 1918), the
    measured rates standing for <a_r>: the Lorentzian analysis is of the G-R part above it.
    """
    spec = acc.current_spectrum
    if spec is None:
        return {}, {}
    freqs = plan.frequencies
    cur, (c_low, c_high) = spec.mean(), spec.interval(plan)
    out = {}
    shot, band = 0.0, None
    if plan.scenario.readout.collection == "events":
        rates = data["event_rate"][1]
        shot = 2.0 * ELEMENTARY_CHARGE_C**2 * float((plan.flow_weight.astype(float) ** 2)
                                                    @ rates)
        out["current_shot_noise"] = ((), shot)
        # fit where the G-R part stands above the shot floor
        above = freqs[(data["current_psd_lna"][1] - shot) > 2.0 * shot]
        band = (freqs[0], above.max()) if above.size else None
    groups = spec.group_means(plan)
    cfit = spectra.analyse_spectrum(freqs, cur - shot, c_low - shot, c_high - shot,
                                    spec.segments(plan), band=band,
                                    batches=None if groups is None else groups - shot,
                                    drive_Hz=_drive_Hz(plan))
    out.update(_fit_vars([cfit], prefix="current_", species_dim=False))
    return out, {}


def drive_response(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Monte Carlo lock-in response at the drive frequency (beside the continuum's)."""
    if acc.drive is None:
        return {}, {}
    q, qi = acc.drive.quadratures()
    amp, amp_err, ph, ph_err = spectra.response_from_quadratures(q)
    out = {
        "response_amplitude": (("species",), amp),
        "response_amplitude_stderr": (("species",), amp_err),
        "response_phase": (("species",), ph),
        "response_phase_stderr": (("species",), ph_err),
    }
    if qi is not None:
        i_amp, i_err, i_ph, i_ph_err = spectra.response_from_quadratures(qi)
        out.update({
            "current_response_amplitude": ((), float(i_amp)),
            "current_response_amplitude_stderr": ((), float(i_err)),
            "current_response_phase": ((), float(i_ph)),
            "current_response_phase_stderr": ((), float(i_ph_err)),
        })
    return out, {}


def devices(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Each trajectory's drawn dopant and trap counts (``dopants = "poisson"``)."""
    if not plan.poisson:
        return {}, {}
    out, coords = acc.stationary.device_variables(plan)
    # each pixel beside its own theory (like with like), not the pooled spread
    out.update(population.own_theory(acc.stationary.sorted_rows(),
                                     lambda c: plan.models.get(c).model, plan.frequencies,
                                     readout=plan.scenario.readout))
    return out, coords


def pixel_population(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Per-pixel mean readout and noise, the fraction above the threshold, worst pixels."""
    if acc.pixels is None:
        return {}, {}
    pop, readout = plan.scenario.population, plan.scenario.readout
    bands = plan.bands
    means, spectra_ = acc.pixels.arrays()
    freqs = np.asarray(pop.frequencies_Hz, dtype=float)
    noise = bands.at(spectra_, freqs)
    kind = "current" if plan.current else "count"
    out = {
        f"pixel_{kind}_mean": (("realization",), means),
        f"pixel_{kind}_noise": (("realization", "noise_frequency"), noise),
        f"pixel_{kind}_spectrum": (("realization", "pixel_frequency"), spectra_),
        "worst_pixel": (("worst",), population.worst_pixels(noise[:, 0])),
    }
    # telegraph-like pixels: one single trap adds more than half of the readout noise
    shares: dict = {}
    share = np.empty_like(noise)
    for row, pix in enumerate(acc.stationary.sorted_rows()):
        counts = pix[4]
        if counts not in shares:  # one linear-noise analysis per distinct device
            shares[counts] = population.single_trap_share(plan.models.get(counts).model,
                                                          freqs, readout=readout)
        share[row] = shares[counts]
    telegraph = share > 0.5
    out["single_trap_share"] = (("realization", "noise_frequency"), share)
    out["telegraph_fraction"] = (("noise_frequency",), telegraph.mean(axis=0))
    out["telegraph_fraction_stderr"] = (("noise_frequency",), np.sqrt(
        telegraph.mean(axis=0) * (1 - telegraph.mean(axis=0)) / len(telegraph)))
    if pop.threshold is not None:
        frac, err = population.threshold_fraction(noise, pop.threshold)
        out["fraction_above_threshold"] = (("noise_frequency",), frac)
        out["fraction_above_threshold_stderr"] = (("noise_frequency",), err)
    coords = {"noise_frequency": ("noise_frequency", freqs),
              "pixel_frequency": ("pixel_frequency", bands.centres)}
    return out, coords


def band_spectra(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """Spectra averaged over 10 bands per decade with their chi-squared intervals, and the
    linear-noise spectra averaged over the same Fourier frequencies."""
    freqs = plan.frequencies
    spec = acc.count_spectrum
    b = band_average(freqs, spec.mean(), spec.segments(plan))
    out = {"psd_band": (("species", "frequency_band"), b.mean),
           "psd_band_low": (("species", "frequency_band"), b.low),
           "psd_band_high": (("species", "frequency_band"), b.high),
           "psd_band_lna": (("species", "frequency_band"),
                            band_average(freqs, data["psd_lna"][1]).mean),
           "band_frequencies": (("frequency_band",), b.counts)}
    cur = acc.current_spectrum
    if cur is not None:
        c = band_average(freqs, cur.mean(), cur.segments(plan))
        out.update({"current_psd_band": (("frequency_band",), c.mean),
                    "current_psd_band_low": (("frequency_band",), c.low),
                    "current_psd_band_high": (("frequency_band",), c.high),
                    "current_psd_band_lna": (("frequency_band",),
                                             band_average(freqs,
                                                          data["current_psd_lna"][1]).mean)})
    return out, {"frequency_band": ("frequency_band", b.centres)}


def readout_band_noise(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """rms noise current over ``[readout] band_Hz`` with its 95 % interval and the
    linear-noise value (:func:`grmc.bandnoise.band_variables`)."""
    readout = plan.scenario.readout
    spec = acc.current_spectrum
    if spec is None or readout is None or readout.band_Hz is None:
        return {}, {}
    from .bandnoise import band_variables
    from .readout import lna_current

    low, high = spec.interval(plan)
    model = plan.base.model
    return band_variables(plan.frequencies, spec.mean(), readout.band_Hz, low=low, high=high,
                          lna=lambda f: lna_current(model, f).psd), {}


def flicker_band(plan: Plan) -> tuple[float, float] | None:
    """The band of the 1/f fit [Hz]: ``[run] flicker_band_Hz`` where given, else the inner
    band of the trap levels' spread of time constants, cut to what the run resolves
    (:func:`grmc.flicker.fit_band`); None when there is neither."""
    return flicker.fit_band(plan.run.flicker_band_Hz,
                            spread.spread_band(plan.base.model, plan.base.steady),
                            plan.frequencies)


def _last_plateau(plateau: np.ndarray) -> np.ndarray:
    """The plateau of the fastest resolved Lorentzian per row (NaN where none) [unit^2/Hz]."""
    rows = np.atleast_2d(plateau)
    out = np.full(rows.shape[0], np.nan)
    for i, row in enumerate(rows):
        ok = np.flatnonzero(np.isfinite(row))
        if ok.size:
            out[i] = row[ok[-1]]
    return out


def flicker_fit(plan: Plan, acc: Accumulators, data: dict) -> tuple[dict, dict]:
    """The 1/f read-out S = K / f^alpha of every count and of the current's G-R part over
    :func:`flicker_band`, jackknife errors over the trajectory groups, and the corner where
    the line meets the fastest resolved plateau (or the current's white shot level)
    (:func:`grmc.flicker.flicker_variables`; McWhorter 1957)."""
    band = flicker_band(plan)
    if band is None:
        return {}, {}
    spec = acc.count_spectrum
    cur = {}
    cspec = acc.current_spectrum
    if cspec is not None:
        shot = float(data["current_shot_noise"][1]) if "current_shot_noise" in data else 0.0
        groups = cspec.group_means(plan)
        cur = {"current_psd": cspec.mean() - shot,
               "current_level": shot or float(_last_plateau(data["current_plateau"][1])[0]),
               "current_groups": None if groups is None else groups - shot}
    return flicker.flicker_variables(plan.frequencies, spec.mean(), spec.segments(plan), band,
                                     groups=spec.group_means(plan),
                                     plateaus=_last_plateau(data["plateau"][1]), **cur), {}


#: The derived quantities, in order (add new ones at the end).
DERIVED = (
    count_fits,
    current_fits,
    drive_response,
    devices,
    pixel_population,
    band_spectra,
    readout_band_noise,
    flicker_fit,
)


def derive(plan: Plan, acc: Accumulators, data: dict, coords: dict) -> None:
    """Run every function of :data:`DERIVED`, adding to ``data`` and ``coords`` in place."""
    for fn in DERIVED:
        new, new_coords = fn(plan, acc, data)
        data.update(new)
        coords.update(new_coords)
