"""``grmc demo``: the bundled demo scenario end to end (run, plots, exports)."""

from __future__ import annotations

from pathlib import Path

from .scenario import load_scenario

__all__ = ["DEMO_SCENARIO", "demo_scenario_path", "run_demo"]

DEMO_SCENARIO = "demo_pixel.toml"


def demo_scenario_path() -> Path:
    """The demo scenario in the source checkout's ``scenarios/`` folder."""
    path = Path(__file__).resolve().parent.parent / "scenarios" / DEMO_SCENARIO
    if not path.is_file():
        raise FileNotFoundError(
            f"{path}: the demo scenario ships with the source checkout; install with "
            "'pip install -e .' from the repository as the README says"
        )
    return path


def _warm_up(scenario) -> None:
    """Load (or compile) the engine's kernels with a one-trajectory, 16-sample run."""
    import dataclasses

    from .simulate import run

    short = dataclasses.replace(scenario.run, trajectories=1, samples=16, settle_s=0.0,
                                duration_s=16.0 * scenario.run.duration_s / scenario.run.samples)
    run(dataclasses.replace(scenario, run=short, population=None), workers=1, progress=False)


def run_demo(outdir: Path, *, workers: int | None = None, command: str | None = None) -> dict:
    """Run the demo scenario into ``outdir``; print and return where everything is.

    Returns
    -------
    dict  ``{"netcdf": Path, "plots": [Path...], "exports": [Path...]}``
    """
    from .dataset import save
    from .export import export_csv, export_spice, export_verilog_a
    from .plotting import plot_all
    from .report import format_run_table
    from .simulate import run

    path = demo_scenario_path()
    scenario = load_scenario(path)
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    print(f"grmc demo: {scenario.title}")
    print(f"  scenario {path}")
    _warm_up(scenario)  # so that the events-per-second figure is the simulation's alone
    ds = run(scenario, workers=workers, command=command)
    nc = save(ds, outdir / f"{path.stem}.nc")
    print(format_run_table(ds, timing_note="the kernels were loaded or compiled beforehand, "
                                           "not counted"))
    plots = plot_all(nc, outdir)
    quantity = "current" if "current_psd" in ds else "electrons"
    exports = [export_csv(ds, outdir / f"{path.stem}_{quantity}_psd.csv", quantity=quantity)]
    if quantity == "current":
        va = export_verilog_a(ds, outdir / f"{path.stem}_noise.va", quantity=quantity)
        exports.extend(va if isinstance(va, (list, tuple)) else [va])
        exports.append(export_spice(ds, outdir / f"{path.stem}_noise.cir"))
    print("\nresults:")
    print(f"  data     {nc}")
    for p in plots:
        print(f"  figure   {p}")
    for p in exports:
        print(f"  export   {p}")
    return {"netcdf": nc, "plots": plots, "exports": exports}
