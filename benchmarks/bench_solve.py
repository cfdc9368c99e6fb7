"""The size ladder: ``grmc solve scenarios/size_ladder.toml --accuracy 0.05`` at volumes
1e-21, 1e-20, ..., 1e-12 cm^3, each rung timed as a whole process (``python -m grmc solve
... --set volume.volume_cm3=V``: interpreter start, imports, the choice, the solve, the file).

    python benchmarks/bench_solve.py                 # all ten rungs
    python benchmarks/bench_solve.py --volumes 1e-16 1e-12 --accuracy 0.05

Printed per rung: the volume, the mean counts (electrons, holes, trapped), the method, the
wall time and the agreement: for an exact answer the probability outside the truncation;
for a linear-noise answer the largest predicted next-order error of a mean or variance
(relative; the chooser asked for it to be below accuracy/5); for a Monte Carlo answer the
worst relative 95 % half-width reached.  Figures are printed, never asserted.  The machine
is shared: the load average is printed beside them.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SCENARIO = os.path.join(ROOT, "scenarios", "size_ladder.toml")
VOLUMES = [10.0 ** e for e in range(-21, -11)]


def agreement(ds) -> str:
    """What backs the answer of one rung (see the module notes)."""
    method = ds.attrs.get("method")
    if method == "exact":
        return f"exact, outside truncation {float(ds['probability_outside']):.1e}"
    if method == "linear-noise":
        from grmc.next_order import next_order
        from grmc.scenario import load_scenario
        from grmc.model import build_model

        scen = load_scenario(text=ds.attrs["scenario_toml"])
        scen = _with_volume(scen, float(ds.attrs["volume_cm3"]))
        no = next_order(build_model(scen))
        return f"predicted next-order error {max(no.relative_mean.max(), no.relative_var.max()):.1e}"
    return f"+-{100 * float(ds.attrs.get('accuracy_reached', float('nan'))):.2g} % (95 %)"


def _with_volume(scen, volume: float):
    from grmc.sweep import point_scenario

    return point_scenario(scen, {"volume.volume_cm3": volume})


def rung(volume: float, accuracy: float, folder: str, limit: float) -> tuple:
    """Solve one rung in a fresh process; return (seconds, Dataset or error text)."""
    out = os.path.join(folder, f"ladder_{volume:.0e}.nc")
    cmd = [sys.executable, "-m", "grmc", "solve", SCENARIO, "--accuracy", str(accuracy),
           "--set", f"volume.volume_cm3={volume:g}", "-o", out]
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=limit, env=env)
    except subprocess.TimeoutExpired:
        return limit, f"over the limit of {limit:g} s"
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        return wall, (proc.stderr.strip().splitlines() or ["failed"])[-1]
    from grmc.dataset import load

    return wall, load(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--volumes", type=float, nargs="*", default=VOLUMES)
    ap.add_argument("--accuracy", type=float, default=0.05)
    ap.add_argument("--limit", type=float, default=300.0, help="seconds allowed per rung")
    args = ap.parse_args()
    print(f"load average before: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"{'volume cm3':>10} {'electrons':>10} {'holes':>10} {'trapped':>9} "
          f"{'method':>13} {'seconds':>8}  agreement")
    with tempfile.TemporaryDirectory() as folder:
        for v in args.volumes:
            wall, res = rung(v, args.accuracy, folder, args.limit)
            if isinstance(res, str):
                print(f"{v:10.0e} {'':>10} {'':>10} {'':>9} {'-':>13} {wall:8.1f}  {res}")
                continue
            m = res["stationary_mean"].values
            print(f"{v:10.0e} {m[0]:10.3g} {m[1]:10.3g} {m[2]:9.3g} "
                  f"{res.attrs['method']:>13} {wall:8.1f}  {agreement(res)}", flush=True)
    print(f"load average after: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
