"""The shared birth-death test volume (not a test module).

Electrons in a heavily p-type box (acceptors 1e20 cm^-3 in 1e-15 cm^3: 1e5 holes) with
radiative recombination only (B = 1e-16 cm^3/s) and light (G = 1e20 cm^-3 s^-1): generation
g = G V = 1e5 /s is constant and the loss B N_h N_e / V is first order in N_e with
k = B N_h / V ~ 1e4 /s, because N_h = A + N_e ~ A.  A linear birth-death process: Poisson
law with mean g/k ~ 10, Lorentzian spectrum with tau = 1/k ~ 100 us (common practice).
"""

from __future__ import annotations


def birth_death_box(*, title: str = "birth-death", light: str = "", more: str = "") -> str:
    """Scenario text: the box above, extra ``[light]`` keys, then further sections."""
    return f"""
title = "{title}"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e6
radiative_cm3_s = 1.0e-16
acceptors_cm3 = 1.0e20
[volume]
volume_cm3 = 1.0e-15
[light]
generation_cm3_s = 1.0e20
{light}
{more}
"""


#: A linear birth-death volume fed by light and drained by a reservoir: constant generation
#: G V, exchange with the reservoir and loss N_e / t_x, no recombination (every law linear,
#: so the linear-noise answers are exact; van Kampen 2007, ch. X).
RESERVOIR_BOX = """
title = "linear birth-death"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
acceptors_cm3 = 1.0e17
[volume]
volume_cm3 = 1.0e-15
[light]
generation_cm3_s = 1.0e20
[reservoir]
carrier = "electrons"
density_cm3 = 1.0e15
exchange_time_s = 1.0e-7
"""
