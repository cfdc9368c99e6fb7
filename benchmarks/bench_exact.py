"""States against seconds for the exact master-equation solver (``grmc exact``).

Each case is solved in a fresh process (so one case's caches do not help the next) with a
time limit; the script prints, per case, the number of states of the truncation and the wall
time (imports excluded) of the stationary law with its spectra (``exact.solve`` with the frequencies of a
``grmc exact`` file) and of the whole ``grmc exact`` Dataset (stationary law, spectra,
transient, continuum and linear-noise lines).

    python benchmarks/bench_exact.py                  # this checkout
    python benchmarks/bench_exact.py --source DIR     # another checkout's grmc (e.g. an older
                                                      # commit unpacked with git archive)
    python benchmarks/bench_exact.py --limit 60       # seconds allowed per case

Figures are printed, never asserted.  The machine is shared: the load average is printed
beside them.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import textwrap
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)

BOX = """
title = "{title}"
[material]
temperature_K = {T}
intrinsic_density_cm3 = {ni}
radiative_cm3_s = 4.73e-15
auger_electron_cm6_s = 2.8e-31
auger_hole_cm6_s = 9.9e-32
acceptors_cm3 = 1.0e17
[volume]
volume_cm3 = {vol}
{traps}
[light]
generation_cm3_s = {G}
[run]
trajectories = 64
duration_s = 2.0e-6
samples = 4096
settle_s = 2.0e-7
seed = 7
"""

LEVEL = """
[[traps]]
label = "{label}"
density_cm3 = {density}
energy_eV = {E}
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = {cp}
"""


def box(title, *, vol=1e-15, T=300.0, ni=1e10, G=1e22, levels=((3e16, 0.0, 1e-8),)):
    traps = "".join(LEVEL.format(label=f"level{k}", density=d, E=E, cp=cp)
                    for k, (d, E, cp) in enumerate(levels))
    return BOX.format(title=title, vol=vol, T=T, ni=ni, G=G, traps=traps)


CASES = {
    "one-level box, 1e-15 cm^3 (30 traps)": box("box 1e-15"),
    "one-level box, 1e-14 cm^3 (300 traps)": box("box 1e-14", vol=1e-14),
    "one-level box, 1e-13 cm^3 (3000 traps)": box("box 1e-13", vol=1e-13),
    "two levels of 30 traps, slow hole capture": box(
        "two levels", G=1e23, levels=((3e16, 0.0, 1e-10), (3e16, 0.1, 1e-10))),
    "cold box, 4 K, shallow-side level (E_t - E_i = 0.05 eV)": box(
        "cold", T=4.0, ni=1e-5, G=1e15, levels=((3e16, 0.05, 1e-8),)),
    "bright box, 1e-15 cm^3, 1e24 cm^-3 s^-1": box("bright", G=1e24),
}

CHILD = textwrap.dedent("""
    import json, sys, time
    import numpy as np
    import xarray  # imported before the clock starts: its import is not the solver's time
    import grmc
    from grmc import exact
    from grmc.exact_output import exact_dataset, exact_frequencies
    scen = grmc.load_scenario(text=sys.stdin.read())
    model = grmc.build_model(scen)
    out = {}
    t = time.perf_counter()
    try:
        res = exact.solve(model, freqs=exact_frequencies(scen))
        out["states"] = int(res.n_states)
        out["spectra_s"] = time.perf_counter() - t
    except Exception as exc:
        out["error"] = type(exc).__name__ + ": " + str(exc)[:90]
        print(json.dumps(out)); sys.exit(0)
    t = time.perf_counter()
    try:
        exact_dataset(scen)
        out["file_s"] = time.perf_counter() - t
    except Exception as exc:
        out["error"] = type(exc).__name__ + ": " + str(exc)[:90]
    print(json.dumps(out))
""")


def run_case(text: str, source: str, limit: float) -> dict:
    env = dict(os.environ, PYTHONPATH=source, PYTHONDONTWRITEBYTECODE="1")
    t = time.perf_counter()
    try:
        proc = subprocess.run([sys.executable, "-c", CHILD], input=text, text=True,
                              capture_output=True, env=env, timeout=limit, cwd="/")
    except subprocess.TimeoutExpired:
        return {"error": f"no answer within {limit:g} s"}
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
    if not lines:
        tail = (proc.stderr.strip().splitlines() or ["?"])[-1]
        return {"error": tail[:100], "wall_s": time.perf_counter() - t}
    return json.loads(lines[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--source", default=ROOT, help="folder holding the grmc package to time")
    ap.add_argument("--limit", type=float, default=120.0, help="seconds allowed per case")
    args = ap.parse_args()
    print(f"grmc from {args.source}; load average {os.getloadavg()[0]:.2f}")
    print(f"{'case':58s} {'states':>7s} {'solve+spectra':>14s} {'grmc exact':>11s}")
    for name, text in CASES.items():
        r = run_case(text, args.source, args.limit)
        states = str(r.get("states", "-"))
        spec = f"{r['spectra_s']:.2f} s" if "spectra_s" in r else "-"
        file_ = f"{r['file_s']:.2f} s" if "file_s" in r else "-"
        print(f"{name:58s} {states:>7s} {spec:>14s} {file_:>11s}"
              + (f"   ({r['error']})" if "error" in r else ""), flush=True)
    print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
