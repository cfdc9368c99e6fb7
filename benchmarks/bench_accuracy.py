"""Time to a +-5 % answer over the default band, for every bundled scenario.

Run ``python benchmarks/bench_accuracy.py`` (``--accuracy REL``, ``--max-seconds S`` per
scenario, ``--workers W``, ``--only NAME``).  Figures are printed, never asserted.

Each scenario of ``scenarios/`` runs as ``grmc run SCENARIO --accuracy 0.05`` would, in
this process (the numba cache warm): its own window where it gives one (the default band is
then clipped to what that window resolves), the first round its ``trajectories``, rounds
doubling until every species' stationary mean and variance and every band of the count and
current spectra inside the band are within +-5 % (95 %), or the budget stops it.  Printed
per scenario: the band, rounds, final trajectories, events simulated (window only), the wall
time of the rounds, the events per second and the accuracy reached ("budget" marks a run the
budget stopped, with what it reached).  ``--choose-window`` removes ``duration_s``,
``samples`` and ``settle_s`` from each scenario, so grmc chooses them from the band.
"""

from __future__ import annotations

import argparse
import os
import re
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import grmc  # noqa: E402
from grmc.scenario import ScenarioError  # noqa: E402
from grmc.simulate import run  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--accuracy", type=float, default=0.05)
    ap.add_argument("--max-seconds", type=float, default=600.0)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--only", action="append", help="scenario stem (repeatable)")
    ap.add_argument("--choose-window", action="store_true",
                    help="leave duration_s, samples and settle_s out (grmc chooses them)")
    args = ap.parse_args()
    paths = sorted((ROOT / "scenarios").glob("*.toml"))
    if args.only:
        paths = [p for p in paths if p.stem in args.only]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"grmc {grmc.__version__}, target +-{100 * args.accuracy:g} % over the default band, "
          f"budget {args.max_seconds:g} s per scenario, load average {load:.2f}"
          + (", window chosen by grmc" if args.choose_window else ", the scenarios' windows"))
    head = (f"| {'scenario':<26} | {'band [Hz]':<17} | rounds | trajectories | events    "
            f"| wall [s] | M events/s | reached |")
    print(head)
    print("|" + "|".join("-" * (len(c)) for c in head.split("|")[1:-1]) + "|")
    for path in paths:
        text = path.read_text()
        if args.choose_window:
            text = re.sub(r"(?m)^(duration_s|samples|settle_s)\s*=.*$", "", text)
        scen = grmc.load_scenario(text=text)
        t0 = time.perf_counter()
        try:
            ds = run(scen, accuracy=args.accuracy, max_seconds=args.max_seconds,
                     workers=args.workers, progress=False)
        except ScenarioError as exc:
            print(f"| {path.stem:<26} | refused: {exc.message[:90]}")
            continue
        total = time.perf_counter() - t0
        f1, f2 = ds.attrs["accuracy_band_Hz"]
        ev = float(ds.attrs["events_total"])
        wall = float(ds.attrs["wall_time_s"])
        reached = f"{100 * float(ds.attrs['accuracy_reached']):.2g} %"
        if ds.attrs["accuracy_stop"] == "budget":
            reached += " budget"
        print(f"| {path.stem:<26} | {f1:7.2g}-{f2:<9.2g} | {int(ds.attrs['rounds']):6d} | "
              f"{int(ds.attrs['trajectories']):12d} | {ev:9.3g} | {wall:8.1f} | "
              f"{ev / wall / 1e6:10.2f} | {reached} |  (total {total:.1f} s)", flush=True)


if __name__ == "__main__":
    main()
