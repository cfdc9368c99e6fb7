"""Events per second of the compiled event engine and of its plain-Python oracle.

Run ``python benchmarks/bench_engine.py`` (``--repeats N``, ``--events N``).  Figures are
printed, never asserted.  Other load on the machine lowers them: each figure is the best of
several repeats, and the load average is printed alongside.

What is measured
----------------
* compile time: a fresh process with an empty numba cache directory runs one short
  trajectory (import of the kernels module, then the first call, which compiles);
* cached load time: a second fresh process with the same cache directory does the same
  (the first call now loads the compiled code);
* engine events/s: :func:`grmc.engine.kernels.run` (the compiled entry alone: tables built
  once, no validation) recording a long window with few samples (16 samples, no oversampling),
  and the same with dense recording (4096 samples x 8 fine bins) for comparison, and the
  public wrapper :func:`grmc.engine.kernels.simulate` (validation and tables per call);
* oracle events/s: :func:`grmc.engine.oracle.simulate` on the same model, a shorter window.

The benchmark network (eleven channels), as the scenario below states: a p-type silicon-like
100 nm cube (N_A = 1e17 cm^-3, 1e5 holes), one mid-gap acceptor-like trap level of 40 traps
(c_n = c_p = 1e-8 cm^3/s), radiative (B = 4.73e-15 cm^3/s), Auger electron and hole processes
with their impact-generation reverses (C_n = 2.8e-31, C_p = 9.9e-32 cm^6/s), thermal
generation, and strong steady light (G = 1e24 cm^-3 s^-1, i.e. 1e9 pairs/s in the volume).
The events are mostly optical generation, electron capture and hole capture (each ~1e9/s of
simulated time).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import grmc  # noqa: E402

SCENARIO = """
title = "engine benchmark: p-type 100 nm box, 40 mid-gap traps, Auger, radiative, strong light"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 4.73e-15
auger_electron_cm6_s = 2.8e-31
auger_hole_cm6_s = 9.9e-32
acceptors_cm3 = 1.0e17
[volume]
size_nm = [100.0, 100.0, 100.0]
[[traps]]
label = "deep"
count = 40
energy_eV = 0.0
kind = "acceptor"
electron_capture_cm3_s = 1.0e-8
hole_capture_cm3_s = 1.0e-8
[light]
generation_cm3_s = 1.0e24
[run]
duration_s = 1.0e-3
"""

#: Start state guess (electrons, holes, occupied traps); the settling run does the rest.
GUESS = [2.5, 1.0e5, 1.0]

_CHILD = r"""
import json, sys, time
c0, w0 = time.process_time(), time.perf_counter()
sys.path.insert(0, {root!r})
import grmc
from grmc.engine import kernels, rng, _jit
c1, w1 = time.process_time(), time.perf_counter()
m = grmc.build_model(grmc.load_scenario(text={scenario!r}))
arr = kernels.kernel_arrays(m)
x0 = m.nearest_neutral_state({guess!r})
c2, w2 = time.process_time(), time.perf_counter()
kernels.simulate(*arr, x0=x0, rng_state=rng.stream_state(1, 0), duration_s=1e-9, n_samples=16)
c3, w3 = time.process_time(), time.perf_counter()
print(json.dumps(dict(import_wall=w1 - w0, import_cpu=c1 - c0, first_wall=w3 - w2,
                      first_cpu=c3 - c2, cache=_jit.CACHE_DIR)))
"""


def child_times(cache_dir: str) -> dict:
    env = {**os.environ, "NUMBA_CACHE_DIR": cache_dir}
    code = _CHILD.format(root=str(ROOT), scenario=SCENARIO, guess=GUESS)
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def best_rate(fn, repeats: int) -> tuple[float, float, int]:
    """Best events/s by wall clock and by this thread's CPU time over ``repeats`` runs."""
    best_w = best_c = 0.0
    n = 0
    for _ in range(repeats):
        w0, c0 = time.perf_counter(), time.thread_time()
        n = fn()
        w, c = time.perf_counter() - w0, time.thread_time() - c0
        best_w, best_c = max(best_w, n / w), max(best_c, n / max(c, 1e-9))
    return best_w, best_c, n


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=7, help="repeats per figure (best taken)")
    ap.add_argument("--events", type=float, default=3.0e7, help="events per engine run")
    ap.add_argument("--oracle-events", type=float, default=2.0e5, help="events per oracle run")
    args = ap.parse_args(argv)

    print(f"python {sys.version.split()[0]}, numpy {np.__version__}, cores {os.cpu_count()}, "
          f"load average {os.getloadavg()[0]:.2f}")
    print("scenario:" + SCENARIO.replace("\n", "\n  "))

    # ---------------------------------------------------------------- compile / cache load
    with tempfile.TemporaryDirectory(prefix="grmc-bench-cache-") as cache:
        cold = child_times(cache)
        warm = child_times(cache)
    print("compile and cache (fresh processes, numba cache in a new temporary directory):")
    print(f"  import grmc.engine.kernels           {cold['import_wall']:6.2f} s wall "
          f"({cold['import_cpu']:.2f} s CPU; includes numba)")
    print(f"  first call, compiling                {cold['first_wall']:6.2f} s wall "
          f"({cold['first_cpu']:.2f} s CPU)")
    print(f"  first call, loading from the cache   {warm['first_wall']:6.2f} s wall "
          f"({warm['first_cpu']:.2f} s CPU)")

    from grmc.engine import kernels, oracle, rng

    model = grmc.build_model(grmc.load_scenario(text=SCENARIO))
    arr = kernels.kernel_arrays(model)
    x0 = model.nearest_neutral_state(GUESS)
    print(f"model: {model.n_species} species, {model.n_channels} channels: "
          + ", ".join(model.channel_names))
    # settle once (100 ns, ~2e2 relaxation times) and start every run from there
    st = rng.stream_state(1, 0)
    x_start = kernels.simulate(*arr, x0=x0, rng_state=st, settle_s=1e-7, duration_s=1e-9,
                               n_samples=1).final
    a0 = float(model.propensities(x_start).sum())
    duration = args.events / a0
    tables = kernels.build_tables(*arr)
    options = kernels.make_options(None, None)

    def engine(n_samples: int, oversample: int):
        def run() -> int:
            work = kernels.allocate_work(tables, model.n_species)
            out = kernels.allocate_outputs(model.n_species, model.n_channels, n_samples,
                                           oversample)
            return int(kernels.run(
                tables, options, work, out, x_start, np.zeros(model.n_species, dtype=np.int64),
                rng.stream_state(2, 0), 0.0, duration, np.int64(n_samples),
                np.int64(oversample)))
        return run

    def wrapper() -> int:
        return kernels.simulate(*arr, x0=x_start, rng_state=rng.stream_state(2, 0),
                                duration_s=duration, n_samples=16).n_events

    o_duration = args.oracle_events / a0

    def the_oracle() -> int:
        return oracle.simulate(*arr, x0=x_start, rng_state=rng.stream_state(2, 0),
                               duration_s=o_duration, n_samples=16).n_events

    engine(16, 1)()  # warm-up
    e_w, e_c, e_n = best_rate(engine(16, 1), args.repeats)
    d_w, d_c, _ = best_rate(engine(4096, 8), max(2, args.repeats // 2))
    s_w, s_c, _ = best_rate(wrapper, max(2, args.repeats // 2))
    o_w, o_c, o_n = best_rate(the_oracle, max(2, args.repeats // 3))
    print("throughput (best of repeats; events/s by wall clock, by thread CPU time):")
    print(f"  engine, 16 samples       {e_w / 1e6:7.1f} M/s wall {e_c / 1e6:7.1f} M/s CPU "
          f"({e_n:.3g} events per run)")
    print(f"  engine, 4096 x 8 bins    {d_w / 1e6:7.1f} M/s wall {d_c / 1e6:7.1f} M/s CPU")
    print(f"  simulate() wrapper       {s_w / 1e6:7.1f} M/s wall {s_c / 1e6:7.1f} M/s CPU")
    print(f"  oracle (plain Python)    {o_w / 1e6:7.3f} M/s wall {o_c / 1e6:7.3f} M/s CPU "
          f"({o_n:.3g} events per run)")
    print(f"  engine / oracle          {e_w / o_w:7.0f} x wall {e_c / o_c:7.0f} x CPU")
    print(f"load average at the end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
