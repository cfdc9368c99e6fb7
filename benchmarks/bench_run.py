"""Whole-process throughput of ``grmc run`` and its scaling from 1 to 2 workers, locally and
on a Dask cluster.

Run ``python benchmarks/bench_run.py`` (``--repeats N``, ``--events N``, ``--no-cluster``).
Figures are printed, never asserted.

What is measured: a fresh ``python -m grmc run`` process (imports, cached kernel load, the
continuum and linear-noise solutions, every trajectory with all recording on, the spectra
and fits, writing the NetCDF file) on the network of ``bench_engine.py`` (p-type 100 nm
silicon-like cube, 40 mid-gap traps, radiative, both Auger processes and their reverses,
strong light; eleven channels), timed from outside with the wall clock.  Events are the
window's events as written in the file (``events_total``); settling is not used.  Figures:

* events/s of the whole process with ``--workers 1`` and ``--workers 2``;
* per core = events/s / workers;
* the serial part: the process's wall time minus the ensemble's (the file's
  ``wall_time_s``), i.e. imports, plan, theory, fits and writing [s];
* the process's own CPU time (user + system), which other load on the machine barely
  changes; on a cluster the workers' CPU is not in it;
* the 2-worker speed-up (wall time of 1 worker / wall time of 2 workers);
* the same with ``--scheduler`` on a ``LocalCluster`` of one and of two single-threaded
  process workers (started once per size, warmed up by one run so each worker has loaded
  the compiled engine from its cache).

A warm-up run first fills the numba cache, so compile time is not counted (it is reported
by ``bench_engine.py``).
"""

from __future__ import annotations

import argparse
import logging
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench_engine import SCENARIO  # noqa: E402  (the same network)

EVENT_RATE = 3.0e9  # approximate events per simulated second of the network [1/s]


def scenario_text(events: float, trajectories: int) -> str:
    duration = events / (EVENT_RATE * trajectories)
    return SCENARIO.replace("duration_s = 1.0e-3", f"""duration_s = {duration:.6g}
trajectories = {trajectories}
samples = 4096
seed = 5""")


def run_once(path: Path, out: Path, options: list[str]) -> dict:
    """One whole ``grmc run`` process: wall [s], its CPU [s], ensemble wall [s], events."""
    import resource

    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "grmc", "run", str(path), "-o", str(out), "-q",
                    *options], check=True, cwd=ROOT, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    import xarray as xr

    with xr.open_dataset(out) as ds:
        events = int(ds.attrs["events_total"])
        ensemble = float(ds.attrs["wall_time_s"])
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return {"wall": wall, "cpu": cpu, "ensemble": ensemble, "events": events}


def measure(label: str, path: Path, tmp: Path, options: dict[int, list[str]],
            repeats: int) -> None:
    """Best of ``repeats`` for 1 and 2 workers, and the speed-up."""
    best = {}
    for workers, opts in options.items():
        runs = [run_once(path, tmp / f"w{workers}.nc", opts) for _ in range(repeats)]
        r = min(runs, key=lambda r: r["wall"])
        best[workers] = r["wall"]
        rate = r["events"] / r["wall"]
        walls = ", ".join(f"{x['wall']:.1f}" for x in runs)
        print(f"  {label}, {workers} worker{'s' if workers > 1 else ''}: {r['events']:.3g} "
              f"events in {r['wall']:.2f} s (all: {walls}) -> {rate / 1e6:.1f} M "
              f"events/s, {rate / workers / 1e6:.1f} M per core; serial part "
              f"{r['wall'] - r['ensemble']:.2f} s; process CPU {r['cpu']:.2f} s")
    print(f"  {label}: speed-up 1 -> 2 workers {best[1] / best[2]:.2f}x")


def _load() -> str:
    return f"{os.getloadavg()[0]:.2f}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=float, default=1.6e8,
                    help="events per run (default: about 10 s with one worker)")
    ap.add_argument("--trajectories", type=int, default=16)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-cluster", action="store_true", help="only the local runs")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        path = tmp / "bench.toml"
        path.write_text(scenario_text(args.events, args.trajectories))
        warm = tmp / "warm.toml"
        warm.write_text(scenario_text(1e6, 2))
        run_once(warm, tmp / "warm.nc", ["--workers", "1"])
        print(f"network: {SCENARIO.splitlines()[1]}")
        print(f"{args.trajectories} trajectories, about {args.events:.2g} events per run, "
              f"best of {args.repeats}; load average {_load()}")
        measure("local", path, tmp, {w: ["--workers", str(w)] for w in (1, 2)}, args.repeats)
        if not args.no_cluster:
            from dask.distributed import LocalCluster

            options = {}
            clusters = []
            try:
                for w in (1, 2):
                    lc = LocalCluster(n_workers=w, threads_per_worker=1, processes=True,
                                      dashboard_address=None, silence_logs=logging.ERROR,
                                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"})
                    clusters.append(lc)
                    options[w] = ["--scheduler", lc.scheduler_address]
                    run_once(warm, tmp / "warm.nc", options[w])
                measure("LocalCluster", path, tmp, options, args.repeats)
            finally:
                for lc in clusters:
                    lc.close()
        print(f"load average at the end {_load()}")


if __name__ == "__main__":
    main()
