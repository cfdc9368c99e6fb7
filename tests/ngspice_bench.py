"""Run a noise subcircuit through ngspice's small-signal noise analysis (test helper).

The testbench: the subcircuit into a noiseless 1 ohm load (a VCCS from the node to itself,
which adds no noise, unlike a resistor), a ``.noise`` analysis from 1 Hz to 100 GHz; the
output noise voltage density squared across 1 ohm is the current spectrum in A^2/Hz.  The
input source needed by ``.noise`` is connected to nothing the output sees.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np

NGSPICE = shutil.which("ngspice")
SKIP_REASON = ("ngspice is not installed (CI installs it with apt-get install -y ngspice; "
               "on another machine install it from your distribution)")


def noise_analysis(subckt_file: Path, name: str, workdir: Path, *, f_lo: float = 1.0,
                   f_hi: float = 1e11, per_decade: int = 10) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies [Hz] and output noise current spectrum [A^2/Hz] of ngspice's .noise."""
    out = workdir / f"{name}_noise.txt"
    bench = workdir / f"{name}_bench.cir"
    bench.write_text(
        f"noise testbench for {name}\n"
        f".include {subckt_file.resolve()}\n"
        f"X1 out 0 {name}\n"
        "Gload out 0 out 0 1\n"
        "Vin in 0 DC 0 AC 1\n"
        "Rin in 0 1\n"
        ".control\n"
        f"noise v(out) Vin dec {per_decade} {f_lo:g} {f_hi:g}\n"
        "setplot noise1\n"
        f"wrdata {out.resolve()} onoise_spectrum\n"
        "quit 0\n"
        ".endc\n"
        ".end\n")
    proc = subprocess.run([NGSPICE, "-b", str(bench)], capture_output=True, text=True,
                          timeout=120, cwd=workdir)
    if proc.returncode != 0 or not out.exists():
        raise RuntimeError(f"ngspice failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    data = np.loadtxt(out)
    return data[:, 0], data[:, 1] ** 2
