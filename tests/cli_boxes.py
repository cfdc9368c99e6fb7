"""Small scenarios the command-line tests share, and a helper that writes one to a file.

``BOX`` is a p-type box with one deep trap level, cheap to simulate; ``SMALL`` a box of a few
states that the exact solver answers in about a second.
"""

from __future__ import annotations

from pathlib import Path

BOX = """
title = "{title}"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
acceptors_cm3 = 1.0e17
[volume]
volume_cm3 = 1.0e-15
[[traps]]
label = "deep"
count = 20
energy_eV = 0.1
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
[run]
trajectories = 4
duration_s = 1.0e-7
samples = 64
"""

# a box small enough for the exact solver (a few states): a real grmc file in a second
SMALL = """
title = "small exact box"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
donors_cm3 = 1.0e10
[volume]
volume_cm3 = 2.0e-10
[[traps]]
label = "t"
count = 2
energy_eV = 0.0
electron_capture_cm3_s = 1.0e-16
hole_capture_cm3_s = 1.0e-16
[run]
trajectories = 8
duration_s = 20.0
samples = 128
"""


def write_scenario(tmp_path: Path, text: str, name: str = "s.toml") -> Path:
    """Write ``text`` to ``tmp_path / name`` and return the path."""
    path = tmp_path / name
    path.write_text(text)
    return path
