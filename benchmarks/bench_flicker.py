"""What a spread of time constants costs: sub-levels in the engine and in a run.

Run ``python benchmarks/bench_flicker.py`` (``--repeats N``).  Figures are printed, never
asserted.

What is measured, on the largest pixel of ``scenarios/interface_traps_1overf.toml`` with
rounded counts (100 traps at the Fermi level of an n-type layer):

* engine events/s (``kernels.run_prepared`` through ``kernels.simulate``, thread CPU time,
  best of the repeats) with the level as one level (``spread_decades = 0``, four channels)
  and spread over six decades (twelve sub-levels, 48 channels): the direct method's cost per
  event grows with the number of channels;
* a whole ``grmc.run`` of 8 trajectories with the spread (thread-independent wall time),
  split into the trajectories (engine and per-trajectory reductions) and the rest (theory,
  fits), from ``wall_time_s`` in the file's attributes.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import grmc  # noqa: E402


def scenario(decades: float, trajectories: int = 8) -> grmc.Scenario:
    text = (ROOT / "scenarios" / "interface_traps_1overf.toml").read_text()
    text = text.replace("spread_decades = 6.0", f"spread_decades = {decades}")
    text = text.replace('dopants = "poisson"', 'dopants = "rounded"')
    text = text.replace("trajectories = 64", f"trajectories = {trajectories}")
    return grmc.load_scenario(text=text)


def engine_rate(decades: float, repeats: int) -> tuple[float, int]:
    from grmc.engine.kernels import kernel_arrays, simulate
    from grmc.engine.rng import stream_state
    from grmc.simulate import start_state

    model = grmc.build_model(scenario(decades))
    arrays = kernel_arrays(model)
    x0 = start_state(model)
    simulate(*arrays, x0=x0, rng_state=stream_state(1, 0), duration_s=1e-6, n_samples=16)
    best = 0.0
    for r in range(repeats):
        t0 = time.thread_time()
        res = simulate(*arrays, x0=x0, rng_state=stream_state(1, r + 1), duration_s=2e-3,
                       n_samples=16)
        dt = time.thread_time() - t0
        best = max(best, res.n_events / dt)
    return best, model.n_channels


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f}")
    for decades in (0.0, 6.0):
        rate, channels = engine_rate(decades, args.repeats)
        print(f"engine, spread_decades = {decades:g}: {channels} channels, "
              f"{rate / 1e6:.1f} M events/s (thread CPU, best of {args.repeats})")
    t0 = time.perf_counter()
    ds = grmc.run(scenario(6.0), workers=1, progress=False)
    wall = time.perf_counter() - t0
    traj = float(ds.attrs["wall_time_s"])
    events = int(ds.attrs["events_total"])
    print(f"grmc.run, 8 trajectories x {ds.attrs['samples']} samples, 6 decades: {wall:.1f} s "
          f"wall ({traj:.1f} s trajectories, {wall - traj:.1f} s theory and fits), "
          f"{events:.3g} events, {events / traj / 1e6:.2f} M events/s incl. reductions")
    species = [str(s) for s in ds["species"].values]
    print(f"species in the file: {len(species)} ({species[:3]} + "
          f"{sum('#' in s for s in species)} sub-levels); alpha of the total "
          f"{float(ds['flicker_exponent'].sel(species='trapped:interface')):.3f} "
          f"+- {float(ds['flicker_exponent_stderr'].sel(species='trapped:interface')):.3f}")


if __name__ == "__main__":
    main()
