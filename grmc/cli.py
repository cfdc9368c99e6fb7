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
from contextlib import contextmanager
from pathlib import Path

from . import __version__
from .scenario import ScenarioError, load_scenario

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130
DEMO_SCENARIO = "demo_pixel.toml"


class UsageError(Exception):
    """Bad arguments (exit status 2)."""


class CommandFailed(Exception):
    """A failure to report in one line with its own exit status."""

    def __init__(self, message: str, status: int):
        super().__init__(message)
        self.status = status


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
    target = _accuracy_options(args)
    with _chunk_runner(args, out) as runner:
        ds = run(scenario, trajectories=args.trajectories, seed=args.seed, workers=args.workers,
                 progress=None if not args.quiet else False, command=args.command_line,
                 runner=runner, **target)
        save(ds, out)
        runner.finish()
    if not args.quiet:
        print(format_run_table(ds))
    print(f"wrote {out}")
    return EXIT_OK


@contextmanager
def _chunk_runner(args, out: Path):
    """The chunk runner of ``--scheduler`` / ``--resume`` (:func:`grmc.distributed.open_runner`)
    with their failures turned into one line: an unreachable scheduler (exit 1), parts of
    another run (exit 2), an interruption that kept finished chunks (how to resume)."""
    from .distributed import BadSchedulerAddress, SchedulerUnreachable, open_runner
    from .parts import PartsRefused, parts_dir

    parts = parts_dir(out)
    if args.resume and not parts.exists():
        print(f"grmc: --resume: nothing to resume ({parts} does not exist); running from the "
              "first trajectory", file=sys.stderr)
    try:
        with open_runner(out, scheduler=args.scheduler, resume=args.resume,
                         workers=args.workers) as runner:
            yield runner
    except SchedulerUnreachable as exc:
        raise CommandFailed(f"--scheduler: {exc}", EXIT_FAIL) from None
    except BadSchedulerAddress as exc:
        raise UsageError(f"--scheduler: {exc}") from None
    except PartsRefused as exc:
        raise UsageError(str(exc)) from None
    except KeyboardInterrupt:
        kept = len(list(parts.glob("chunk_*.pkl"))) if parts.is_dir() else 0
        if not kept:
            raise
        raise CommandFailed(f"interrupted; {_resume_hint(args, parts, kept)}",
                            EXIT_INTERRUPTED) from None
    except Exception as exc:
        if not type(exc).__module__.startswith("distributed"):
            raise
        # the cluster gave up on a chunk (e.g. it killed every worker that ran it)
        kept = len(list(parts.glob("chunk_*.pkl"))) if parts.is_dir() else 0
        hint = f"; {_resume_hint(args, parts, kept)}" if kept else ""
        raise CommandFailed(f"--scheduler: the cluster failed: {type(exc).__name__}: "
                            f"{str(exc).strip().splitlines()[0] if str(exc).strip() else ''}"
                            f"{hint}", EXIT_FAIL) from None


def _resume_hint(args, parts: Path, kept: int) -> str:
    again = args.command_line if args.resume else f"{args.command_line} --resume"
    return f"{kept} finished chunks are kept in {parts}; to continue, run: {again}"


def _accuracy_options(args) -> dict:
    """``--accuracy``, ``--band F1:F2`` and ``--max-seconds`` checked (exit 2 names them)."""
    where = args.scenario

    def number(option: str, text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise UsageError(f"{where}: {option}: expected a number, got {text!r}") from None
        if value != value or value in (float("inf"), float("-inf")):
            raise UsageError(f"{where}: {option}: must be finite, got {text!r}")
        return value

    out = {}
    if args.accuracy is not None:
        out["accuracy"] = number("--accuracy", args.accuracy)
        if not 0.0 < out["accuracy"] < 1.0:
            raise UsageError(f"{where}: --accuracy: must be between 0 and 1 (a relative "
                             f"half-width, e.g. 0.05), got {args.accuracy}")
    if args.band is not None:
        parts = args.band.split(":")
        if len(parts) != 2:
            raise UsageError(f"{where}: --band: expected F1:F2 in Hz, got {args.band!r}")
        f1, f2 = (number("--band", p) for p in parts)
        if f1 <= 0 or f1 >= f2:
            raise UsageError(f"{where}: --band: needs 0 < F1 < F2, got {args.band}")
        out["band_Hz"] = (f1, f2)
    if args.max_seconds is not None:
        out["max_seconds"] = number("--max-seconds", args.max_seconds)
        if out["max_seconds"] <= 0:
            raise UsageError(f"{where}: --max-seconds: must be > 0, got {args.max_seconds}")
    return out


def cmd_plot(args) -> int:
    from .plotting import plot_all

    path = _existing_file(args.file)
    outdir = Path(args.output) if args.output else path.parent
    for p in plot_all(path, outdir):
        print(f"wrote {p}")
    return EXIT_OK


def cmd_export(args) -> int:
    from .dataset import load
    from .export import export_csv, export_verilog_a

    path = _existing_file(args.file)
    ds = load(path)
    quantity = args.quantity
    if quantity is not None and quantity != "current":
        if quantity not in [str(s) for s in ds["species"].values]:
            names = ", ".join(["current", *map(str, ds["species"].values)])
            raise UsageError(f"{path}: --quantity {quantity!r} is not in the file ({names})")
    if quantity == "current" and "current_psd" not in ds:
        raise UsageError(f"{path}: the file has no current (the scenario had no [readout])")
    try:
        if args.format == "csv":
            written = export_csv(ds, args.output, quantity=quantity)
        else:
            written = export_verilog_a(ds, args.output, quantity=quantity,
                                       interpolation=args.interpolation, source=args.source)
    except ValueError as exc:
        raise UsageError(f"{path}: {exc}") from None
    if isinstance(written, (list, tuple)):
        for w in written:
            print(f"wrote {w}")
    else:
        print(f"wrote {written or args.output}")
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
                  workers=args.workers, command=args.command_line)
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
def _scale_out_options(p: argparse.ArgumentParser) -> None:
    """``--scheduler`` and ``--resume`` of the commands that simulate an ensemble."""
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the trajectory chunks on a running Dask scheduler, e.g. "
                        "tcp://10.0.0.5:8786 (--workers is then ignored)")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run from the finished chunks kept in "
                        "<OUT>.parts/")


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
    p.add_argument("--accuracy", metavar="REL",
                   help="run in rounds until every checked 95 %% half-width is at most REL "
                        "(relative, 0 < REL < 1); overrides [run] accuracy")
    p.add_argument("--band", metavar="F1:F2",
                   help="band [Hz] the spectra must reach the accuracy in; overrides "
                        "[run] band_Hz (default: from the linear-noise corners)")
    p.add_argument("--max-seconds", metavar="S",
                   help="time budget of a run in rounds; overrides [run] max_seconds "
                        "(default 600)")
    _scale_out_options(p)
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

    p = sub.add_parser("export", help="a noise spectrum for circuit work (CSV or Verilog-A)")
    p.add_argument("file", help="output file (.nc)")
    p.add_argument("--format", required=True, choices=("csv", "verilog-a"))
    p.add_argument("--quantity", help="'current' (default where present) or a species name")
    p.add_argument("--interpolation", choices=("linear", "log"), default="linear",
                   help="Verilog-A: noise_table (linear) or noise_table_log (log-log)")
    p.add_argument("--source", choices=("mc", "fit", "lna"), default="mc",
                   help="Verilog-A: which spectrum to tabulate")
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
    except CommandFailed as exc:
        kind = "" if exc.status == EXIT_INTERRUPTED else "error: "
        print(f"grmc: {kind}{exc}", file=sys.stderr)
        return exc.status
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
