"""The command line: ``grmc <command> ...``.

Only this module knows about argparse, exit codes and the terminal.  Each subcommand calls
one public function and formats its result.  Heavy libraries (numba, xarray, matplotlib, dask)
are imported inside the commands that need them, so ``grmc --help`` answers at once.

Exit status: 0 success; 2 bad scenario or arguments (one message on stderr naming the file
and the key, no traceback); 1 anything else; 130 interrupted (nothing written).
"""

from __future__ import annotations

import argparse
import json
import shlex
import sys
from pathlib import Path

from . import __version__
from .scenario import ScenarioError, load_scenario

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130
DEMO_SCENARIO = "demo_pixel.toml"


class UsageError(Exception):
    """Bad arguments (exit status 2)."""


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1, got {value}")
    return value


def _nonneg_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be >= 0, got {value}")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not value > 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text}")
    return value


def _command_line(argv: list[str] | None) -> str:
    args = sys.argv[1:] if argv is None else argv
    return " ".join(["grmc", *(shlex.quote(a) for a in args)])


def _existing_file(name: str) -> Path:
    path = Path(name)
    if not path.is_file():
        raise UsageError(f"{path}: no such file")
    return path


def _default_output(scenario_path: str, suffix: str = "") -> Path:
    return Path("outputs") / f"{Path(scenario_path).stem}{suffix}.nc"


# ------------------------------------------------------------------------------ commands
def cmd_check(args) -> int:
    from .summary import format_summary, summarize

    scenario = load_scenario(args.scenario)
    info = summarize(scenario)
    if args.json:
        print(json.dumps(info, indent=2))
    else:
        print(format_summary(info))
    return EXIT_OK


def cmd_run(args) -> int:
    from .dataset import save
    from .report import format_run_table
    from .simulate import run

    scenario = load_scenario(args.scenario)
    out = Path(args.output) if args.output else _default_output(args.scenario)
    ds = run(scenario, trajectories=args.trajectories, seed=args.seed, workers=args.workers,
             progress=None if not args.quiet else False, command=args.command_line)
    save(ds, out)
    if not args.quiet:
        print(format_run_table(ds))
    print(f"wrote {out}")
    return EXIT_OK


def cmd_plot(args) -> int:
    from .plotting import plot_all

    path = _existing_file(args.file)
    outdir = Path(args.output) if args.output else path.parent
    for p in plot_all(path, outdir):
        print(f"wrote {p}")
    return EXIT_OK


def _export_request(args, path: Path, ds) -> tuple[str | None, tuple[float, float]]:
    """Check --quantity and --band against the file; return (quantity, band)."""
    from .export_curve import ExportOptionError, parse_band

    quantity = args.quantity
    names = [str(s) for s in ds["species"].values] if "species" in ds else []
    if quantity is not None and quantity != "current" and quantity not in names:
        raise UsageError(f"{path}: --quantity {quantity!r} is not in the file "
                         f"({', '.join(['current', *names])})")
    if quantity == "current" and "current_psd" not in ds:
        raise UsageError(f"{path}: --quantity: the file has no current (the scenario had no "
                         "[readout])")
    if args.format in ("spice", "verilog-a") and "current_psd" not in ds:
        raise UsageError(f"{path}: --format {args.format}: the file has no current (the "
                         "scenario had no [readout]); export a count with --format csv")
    try:
        band = parse_band(args.band)
    except ExportOptionError as exc:
        raise UsageError(f"{path}: {exc}") from None
    return quantity, band


def cmd_export(args) -> int:
    from .dataset import load
    from .export import export_csv, export_spice, export_verilog_a

    path = _existing_file(args.file)
    ds = load(path)
    quantity, band = _export_request(args, path, ds)
    common = dict(quantity=quantity, source=args.source, band=band)
    try:
        if args.format == "csv":
            written = export_csv(ds, args.output, **common)
        elif args.format == "spice":
            written = export_spice(ds, args.output, **common)
        else:
            written = export_verilog_a(ds, args.output, interpolation=args.interpolation,
                                       **common)
    except ValueError as exc:
        raise UsageError(f"{path}: {exc}") from None
    for w in (written if isinstance(written, (list, tuple)) else [written]):
        print(f"wrote {w}")
    return EXIT_OK


def cmd_exact(args) -> int:
    from .dataset import save
    from .exact_output import exact_dataset

    scenario = load_scenario(args.scenario)
    out = Path(args.output) if args.output else _default_output(args.scenario, "_exact")
    ds = exact_dataset(scenario, command=args.command_line)
    save(ds, out)
    print(f"exact solution on {int(ds.attrs['n_states'])} states, probability outside the "
          f"truncation {float(ds['probability_outside']):.2e}")
    print(f"wrote {out}")
    return EXIT_OK


def cmd_sweep(args) -> int:
    from .sweep import parse_vary, run_sweep

    scenario = load_scenario(args.scenario)
    try:
        varies = [parse_vary(v) for v in args.vary]
    except ValueError as exc:
        raise UsageError(f"--vary: {exc}") from None
    out = Path(args.output) if args.output else _default_output(args.scenario, "_sweep")
    try:
        run_sweep(scenario, varies, out, scheduler=args.scheduler, resume=args.resume,
                  workers=args.workers, command=args.command_line,
                  noise_frequencies=tuple(args.frequency) if args.frequency else None)
    except KeyboardInterrupt:
        print(f"grmc: interrupted; finished points are kept in {out}.parts, "
              "run the same command with --resume to continue", file=sys.stderr)
        return EXIT_INTERRUPTED
    print(f"wrote {out}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from .demo import run_demo

    run_demo(Path(args.output), workers=args.workers, command=args.command_line)
    return EXIT_OK


# ------------------------------------------------------------------------------ parser
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="grmc",
        description="Exact stochastic generation-recombination noise in nanoscale "
        "semiconductor volumes: carriers counted one by one, spectra with confidence "
        "intervals, beside the continuum and linear-noise answers.",
    )
    parser.add_argument("--version", action="version", version=f"grmc {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser("run", help="run the ensemble and write the NetCDF file")
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("-o", "--output", help="output file (default outputs/<stem>.nc)")
    p.add_argument("--trajectories", type=_positive_int, help="override [run] trajectories")
    p.add_argument("--seed", type=_nonneg_int, help="override [run] seed")
    p.add_argument("--workers", type=_positive_int, help="threads (default: all cores)")
    p.add_argument("-q", "--quiet", action="store_true", help="no table, no progress bar")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("check", help="validate a scenario and show what it implies")
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("plot", help="PNG figures of an output file")
    p.add_argument("file", help="output file (.nc) of run, exact or sweep")
    p.add_argument("-o", "--output", help="folder for the PNGs (default: next to the file)")
    p.set_defaults(func=cmd_plot)

    p = sub.add_parser("export", help="a noise spectrum for circuit work (CSV, Verilog-A, "
                       "SPICE subcircuit)")
    p.add_argument("file", help="output file (.nc)")
    p.add_argument("--format", required=True, choices=("csv", "verilog-a", "spice"))
    p.add_argument("--quantity", help="'current' (default where present) or a species name")
    p.add_argument("--interpolation", choices=("linear", "log"), default="linear",
                   help="Verilog-A: noise_table (linear) or noise_table_log (log-log)")
    p.add_argument("--source", choices=("fit", "lna", "mc"), default=None,
                   help="the exported curve: the stored Lorentzian fit, the linear-noise "
                   "spectrum or the Monte Carlo estimate (default: fit where it passed its "
                   "checks, else lna)")
    p.add_argument("--band", default="1:1e11", metavar="F1:F2",
                   help="band of the export in Hz (default 1:1e11); outside the simulated "
                   "band the fitted or linear-noise tails")
    p.add_argument("-o", "--output", required=True, help="file to write")
    p.set_defaults(func=cmd_export)

    p = sub.add_parser("exact", help="exact master-equation solution (small volumes)")
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("-o", "--output", help="output file (default outputs/<stem>_exact.nc)")
    p.set_defaults(func=cmd_exact)

    p = sub.add_parser("sweep", help="a parameter sweep (exact or Monte Carlo per point)")
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("--vary", action="append", required=True, metavar="KEY=START:STOP:N[:log]",
                   help="section.key (or traps.<label>.key) and its range; repeatable")
    p.add_argument("--scheduler", help="address of a running Dask scheduler")
    p.add_argument("--resume", action="store_true", help="continue an interrupted sweep")
    p.add_argument("--workers", type=_positive_int, help="local Dask workers (default: cores)")
    p.add_argument("--frequency", type=_positive_float, action="append", metavar="HZ",
                   help="with a [readout]: record the current noise at this frequency "
                   "(repeatable; default 1000 Hz)")
    p.add_argument("-o", "--output", help="output file (default outputs/<stem>_sweep.nc)")
    p.set_defaults(func=cmd_sweep)

    p = sub.add_parser("demo", help="run the bundled demo end to end into outputs/")
    p.add_argument("-o", "--output", default="outputs", help="folder (default outputs/)")
    p.add_argument("--workers", type=_positive_int, help="threads (default: all cores)")
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``grmc`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    args.command_line = _command_line(argv)
    try:
        return args.func(args)
    except ScenarioError as exc:
        print(f"grmc: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except UsageError as exc:
        print(f"grmc: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except Exception as exc:  # known refusals of the solvers: one clear line, no traceback
        from .continuum import ContinuumError
        from .exact import StateSpaceTooLarge

        if isinstance(exc, (ContinuumError, StateSpaceTooLarge)):
            where = getattr(args, "scenario", None) or getattr(args, "file", "")
            print(f"grmc: error: {where}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        raise
    except KeyboardInterrupt:
        print("grmc: interrupted; no output written", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # pragma: no cover - e.g. piped into head
        return EXIT_OK
