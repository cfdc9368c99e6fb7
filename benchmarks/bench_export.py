"""Circuit exports: how long they take, and how closely ngspice reproduces the SPICE export.

Makes the linear-noise and exact files it needs (``grmc exact`` of the junction volume, a
dark forward-biased variant, and the demo pixel) in a temporary folder, then for each:
wall time of ``export_spice``, ``export_verilog_a`` and ``export_csv`` (best of the repeats),
the ngspice ``.noise`` run time (1 Hz .. 100 GHz, 10 points per decade) and the largest
relative deviation of ngspice's output noise from the exported spectrum.  Figures are
printed, never asserted.

    python benchmarks/bench_export.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))


def _files(where: Path) -> dict[str, Path]:
    import grmc
    from grmc import dataset
    from grmc.exact_output import exact_dataset

    junction = (ROOT / "scenarios" / "photodiode_junction.toml").read_text()
    dark = junction.replace("generation_cm3_s = 5.0e21", "generation_cm3_s = 0.0").replace(
        "density_cm3 = 2.0e3 ", "density_cm3 = 1.0e15 ")
    demo = (ROOT / "scenarios" / "demo_pixel.toml").read_text()
    out = {}
    for name, text in (("junction", junction), ("dark junction", dark), ("demo pixel", demo)):
        ds = exact_dataset(grmc.load_scenario(text=text))
        out[name] = dataset.save(ds, where / (name.replace(" ", "_") + ".nc"))
    return out


def _best(fn, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    from grmc import dataset, export
    from grmc.export_curve import export_curve
    from ngspice_bench import NGSPICE, noise_analysis

    print(f"load average {os.getloadavg()[0]:.2f}; ngspice: {NGSPICE or 'absent'}")
    with tempfile.TemporaryDirectory() as tmp:
        where = Path(tmp)
        files = _files(where)
        print(f"{'file':<16}{'spice s':>10}{'verilog-a s':>13}{'csv s':>9}{'ngspice s':>11}"
              f"{'max |dev|':>12}")
        for name, path in files.items():
            ds = dataset.load(path)
            cir = where / (path.stem + ".cir")
            t_sp = _best(lambda: export.export_spice(ds, cir), args.repeats)
            t_va = _best(lambda: export.export_verilog_a(ds, where / "x.va"), args.repeats)
            t_csv = _best(lambda: export.export_csv(ds, where / "x.csv"), args.repeats)
            t_ng, dev = float("nan"), float("nan")
            if NGSPICE:
                t0 = time.perf_counter()
                f, s = noise_analysis(cir, path.stem, where)
                t_ng = time.perf_counter() - t0
                cur = export_curve(ds, export.spectrum_table(ds))
                dev = float(np.max(np.abs(s / cur(f) - 1.0)))
            print(f"{name:<16}{t_sp:>10.3f}{t_va:>13.3f}{t_csv:>9.3f}{t_ng:>11.3f}{dev:>12.2e}")


if __name__ == "__main__":
    main()
