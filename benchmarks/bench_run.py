"""Whole-process throughput of ``grmc run`` and its scaling from 1 to 2 workers.

Run ``python benchmarks/bench_run.py`` (``--repeats N``, ``--events N``).  Figures are
printed, never asserted.

What is measured: a fresh ``python -m grmc run`` process (imports, cached kernel load, the
continuum and linear-noise solutions, every trajectory with all recording on, the spectra
and fits, writing the NetCDF file) on the network of ``bench_engine.py`` (p-type 100 nm
silicon-like cube, 40 mid-gap traps, radiative, both Auger processes and their reverses,
strong light; eleven channels), timed from outside with the wall clock.  Events are the
window's events as written in the file (``events_total``); settling is not used.  Figures:

* events/s of the whole process with ``--workers 1`` and ``--workers 2``;
* per core = events/s / workers;
* the 2-worker speed-up (wall time of 1 worker / wall time of 2 workers).

A warm-up run first fills the numba cache, so compile time is not counted (it is reported
by ``bench_engine.py``).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench_engine import SCENARIO  # noqa: E402  (the same network)

EVENT_RATE = 4.0e9  # approximate events per simulated second of the network [1/s]


def scenario_text(events: float, trajectories: int) -> str:
    duration = events / (EVENT_RATE * trajectories)
    return SCENARIO.replace("duration_s = 1.0e-3", f"""duration_s = {duration:.6g}
trajectories = {trajectories}
samples = 4096
seed = 5""")


def run_once(path: Path, out: Path, workers: int) -> tuple[float, int]:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "grmc", "run", str(path), "-o", str(out),
                    "--workers", str(workers), "-q"], check=True, cwd=ROOT,
                   stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    import xarray as xr

    with xr.open_dataset(out) as ds:
        events = int(ds.attrs["events_total"])
    return wall, events


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=float, default=6.0e8, help="events per run")
    ap.add_argument("--trajectories", type=int, default=16)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        path = tmp / "bench.toml"
        path.write_text(scenario_text(args.events, args.trajectories))
        warm = tmp / "warm.toml"
        warm.write_text(scenario_text(1e6, 2))
        run_once(warm, tmp / "warm.nc", 1)
        print(f"network: {SCENARIO.splitlines()[1]}")
        print(f"{args.trajectories} trajectories, about {args.events:.2g} events per run, "
              f"best of {args.repeats}; load average {os.getloadavg()[0]:.2f}")
        best = {}
        for workers in (1, 2):
            runs = [run_once(path, tmp / f"w{workers}.nc", workers) for _ in range(args.repeats)]
            wall, events = min(runs)
            best[workers] = wall
            rate = events / wall
            print(f"  --workers {workers}: {events:.3g} events in {wall:.2f} s -> "
                  f"{rate / 1e6:.1f} M events/s, {rate / workers / 1e6:.1f} M per core")
        print(f"  speed-up 1 -> 2 workers: {best[1] / best[2]:.2f}x")


if __name__ == "__main__":
    main()
