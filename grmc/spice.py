"""A SPICE noise subcircuit with a given rational current spectrum.

The subcircuit ``.subckt NAME p n`` is a pure noise element: a noise current from p to n,
no DC current, no signal path, infinite output impedance.  It uses only the core elements
every SPICE reads: resistors (their thermal noise is the only noise source), capacitors and
voltage-controlled current sources (``G`` elements, noiseless).

* A positive sum of Lorentzians plus a white level (:class:`grmc.rational.RationalSpectrum`
  with every plateau >= 0): per Lorentzian, one resistor R with a capacitor C across it.  The
  resistor's Johnson-Nyquist voltage noise 4kTR (Nyquist, Phys. Rev. 32, 110, 1928) is
  shaped by the RC low-pass into ``4kTR / (1 + (2 pi f R C)^2)``; a VCCS of gain g turns it
  into ``g^2 4kTR / (1 + (f/f_c)^2)``, f_c = 1/(2 pi R C).  The white level is one resistor
  read by a VCCS.  Each stage has its own resistor, so the Lorentzians add in power.
* Any other rational spectrum that is positive (a junction's net current falls towards low
  frequencies): its minimum-phase factor ``H(s) = h0 + sum_k r_k / (s + w_k)``
  (:func:`grmc.rational.spectral_factor`), driven by the white noise of one resistor.  Each
  pole is an integrator node: a VCCS injects the noise voltage into a capacitor C_k that a
  second VCCS from the node to itself discharges with the conductance G_k = w_k C_k
  (noiseless, unlike a resistor); the output VCCS's sum the states with the residues and the
  direct term.

Scaling: every shaping node has a DC gain of one (its voltage is of the order of the noise
voltage of its resistor), resistors are 1 kohm, and the time constants sit in the
capacitors, so the nodal equations stay well conditioned from 1 Hz to beyond 100 GHz.

Temperature: the resistors carry the instance temperature ``temp=27`` (deg C), the default
circuit temperature of SPICE, and the gains are computed for T = 300.15 K.  A simulator that
honours the instance temperature gives the same noise at any circuit temperature; ngspice 39
takes the thermal noise of a resistor at the circuit temperature (plus ``dtemp``) whatever
``temp`` says (measured here), so keep such a circuit at 27 deg C or scale the result by
300.15 K / T.
"""

from __future__ import annotations

import math
import re

from .rational import RationalSpectrum, spectral_factor

__all__ = ["subcircuit", "spice_name", "BOLTZMANN_J_K", "NOISE_TEMPERATURE_K", "RESISTANCE_OHM"]

#: Boltzmann constant, exact in the 2019 SI [J/K].
BOLTZMANN_J_K = 1.380649e-23
#: Temperature of the noise resistors: 27 deg C, the default SPICE circuit temperature [K].
NOISE_TEMPERATURE_K = 300.15
#: Resistance of every noise resistor; shaping conductances are 1/RESISTANCE_OHM [ohm].
RESISTANCE_OHM = 1.0e3

_TEMP = f"temp={NOISE_TEMPERATURE_K - 273.15:g}"


def _num(x: float) -> str:
    """A plain SPICE number: no scale suffix (1e-3 is never misread as 'm' = milli)."""
    if not math.isfinite(x):
        raise ValueError(f"internal: a non-finite element value ({x!r}) in the netlist")
    return f"{x:.10e}"


def _johnson(r: float = RESISTANCE_OHM) -> float:
    """One-sided voltage noise of a resistor, 4kTR [V^2/Hz] (Nyquist 1928)."""
    return 4.0 * BOLTZMANN_J_K * NOISE_TEMPERATURE_K * r


def _bank(spec: RationalSpectrum) -> list[str]:
    """Independent RC stages, one per Lorentzian, and one white resistor."""
    r = RESISTANCE_OHM
    lines = ["* a bank of independent noise generators (powers add):"]
    if spec.white > 0:
        g = math.sqrt(spec.white / _johnson(r))
        lines += [f"* white level {spec.white:.6e} A^2/Hz",
                  f"Rw w 0 {_num(r)} {_TEMP}",
                  f"Gw p n w 0 {_num(g)}"]
    for k, (fc, a) in enumerate(zip(spec.corners, spec.amplitudes), start=1):
        if a <= 0:
            continue
        c = 1.0 / (2.0 * math.pi * fc * r)
        g = math.sqrt(a / _johnson(r))
        lines += [f"* Lorentzian {k}: plateau {a:.6e} A^2/Hz, corner {fc:.6e} Hz",
                  f"Rl{k} l{k} 0 {_num(r)} {_TEMP}",
                  f"Cl{k} l{k} 0 {_num(c)}",
                  f"Gl{k} p n l{k} 0 {_num(g)}"]
    return lines


def _factor(spec: RationalSpectrum) -> list[str]:
    """One white source through the minimum-phase factor, in parallel (diagonal) form."""
    fac = spectral_factor(spec)
    r = RESISTANCE_OHM
    g_unit = 1.0 / r
    amp = math.sqrt(_johnson(r))  # noise voltage density of the source [V/sqrt(Hz)]
    zeros = ", ".join(f"{z.real / (2 * math.pi):.4e} Hz" for z in fac.zeros) or "none"
    lines = ["* minimum-phase spectral factor H(s) = h0 + sum_k r_k/(s + w_k) driven by the",
             f"* white noise of one resistor; zeros (real part, /2 pi): {zeros}",
             f"Ru u 0 {_num(r)} {_TEMP}"]
    if fac.h0 != 0:
        lines.append(f"Gd p n u 0 {_num(fac.h0 / amp)}")
    for k, (w, res) in enumerate(zip(fac.rates, fac.residues), start=1):
        c = g_unit / w
        lines += [f"* pole {k}: {w / (2 * math.pi):.6e} Hz",
                  f"Gi{k} 0 x{k} u 0 {_num(g_unit)}",
                  f"Gr{k} x{k} 0 x{k} 0 {_num(g_unit)}",
                  f"Cx{k} x{k} 0 {_num(c)}",
                  f"Go{k} p n x{k} 0 {_num(res / (w * amp))}"]
    return lines


def subcircuit(spec: RationalSpectrum, name: str, header: list[str]) -> str:
    """The netlist text of a ``.subckt NAME p n`` whose noise current has spectrum ``spec``.

    Parameters
    ----------
    spec : RationalSpectrum  One-sided current spectrum [A^2/Hz]
    name : str  Subcircuit name (a SPICE identifier)
    header : list of str  Comment lines (without the leading ``*``) written first

    Returns
    -------
    str  Lines ``* ...``, ``* subckt: NAME``, ``.subckt NAME p n``, elements, ``.ends NAME``

    Notes
    -----
    A positive sum of Lorentzians is realised as a bank of RC stages, anything else through
    the spectral factor (see the module notes).  ``G p n a 0 g`` drives the current g v(a)
    from p through the source to n; the sign does not matter for the noise power, only the
    relative signs of the factor's terms, which are kept.
    """
    body = _bank(spec) if spec.is_positive_sum else _factor(spec)
    out = ["* " + h for h in header]
    out += [f"* subckt: {name}", "* ports: p n (noise current from p to n; no DC current, no "
            "signal path, infinite output impedance)",
            f"* noise resistors at {_TEMP} (deg C) = {NOISE_TEMPERATURE_K} K; Boltzmann "
            f"constant {BOLTZMANN_J_K} J/K",
            f".subckt {name} p n"]
    out += body
    out += [f".ends {name}", ""]
    return "\n".join(out)


def spice_name(stem: str) -> str:
    """A SPICE identifier from a file stem: letters, digits and '_' only, not starting with a
    digit."""
    cand = re.sub(r"[^A-Za-z0-9_]", "_", stem) or "grmc_noise"
    if not cand[0].isalpha():
        cand = "n" + cand
    return cand
