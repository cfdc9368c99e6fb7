"""The command line: ``grmc <command> ...``.

Only this module knows about argparse, exit codes and the terminal.  Each subcommand calls
one public function and formats its result.  Heavy libraries (numba, xarray, matplotlib, dask)
are imported inside the commands that need them, so ``grmc --help`` answers at once.

Exit status: 0 success; 2 bad scenario, arguments or input file (one message on stderr
naming the file and the key or option, no traceback); 1 a failure of the environment (disk
full, a folder that vanished, a cluster that went away: one line); 130 interrupted by Ctrl-C,
143 by SIGTERM (nothing written either way).
"""

from __future__ import annotations

import argparse
import json
import os
import shlex
import signal
import sys
import tempfile
from contextlib import contextmanager
from pathlib import Path

from . import __version__
from .scenario import ScenarioError, check_counts, load_scenario

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_INTERRUPTED, EXIT_TERMINATED = 0, 1, 2, 130, 143
DEMO_SCENARIO = "demo_pixel.toml"


class UsageError(Exception):
    """Bad arguments (exit status 2)."""


class Terminated(KeyboardInterrupt):
    """SIGTERM, delivered like Ctrl-C so every clean-up path runs (exit status 143)."""


def _on_sigterm(signum, frame):  # pragma: no cover - exercised in a subprocess
    raise Terminated()


class _Parser(argparse.ArgumentParser):
    """argparse with errors as one line and a hint instead of the whole usage block."""

    def error(self, message: str):
        hint = f"see '{self.prog} --help'"
        self.exit(EXIT_USAGE, f"grmc: error: {message} ({hint})\n")


def _probe_folder(folder: Path, what: str) -> None:
    """Refuse a folder that cannot be created or written (before any work is done)."""
    existing = folder
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    if not existing.is_dir():
        raise UsageError(f"{what}: {existing} is a file, not a folder")
    try:
        fd, probe = tempfile.mkstemp(prefix=".grmc-probe.", dir=existing)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise UsageError(f"{what}: cannot write in {existing} ({exc.strerror or exc})") from None


def _output_file(value: str | None, default: Path, option: str = "-o") -> Path:
    """The output file of a command, checked to be writable before anything runs."""
    if value is not None and not value.strip():
        raise UsageError(f"{option}: empty file name")
    path = Path(value) if value is not None else default
    if path.is_dir():
        raise UsageError(f"{option} {path}: is an existing folder; give a file name")
    _probe_folder(path.parent, f"{option} {path}")
    return path


def _output_folder(value: str | None, default: Path, option: str = "-o") -> Path:
    """An output folder, checked to be creatable and writable before anything runs."""
    if value is not None and not value.strip():
        raise UsageError(f"{option}: empty folder name")
    path = Path(value) if value is not None else default
    if path.exists() and not path.is_dir():
        raise UsageError(f"{option} {path}: is a file, not a folder")
    _probe_folder(path, f"{option} {path}")
    return path


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
    if value > 2**63 - 1:
        raise argparse.ArgumentTypeError(f"must be <= {2**63 - 1}, got {value}")
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


def _read_output(name: str):
    """A grmc output file as a Result; one line saying what it is not, otherwise."""
    from .result import NotAGrmcFile, open_result

    try:
        return open_result(_existing_file(name))
    except NotAGrmcFile as exc:
        raise UsageError(str(exc)) from None


def _refuse_absurd_run(scenario, trajectories: int | None, workers: int | None) -> None:
    """Refuse (exit 2) a run that could not finish or fit in memory; warn on a long one."""
    from .cost import cost_warnings, refuse_absurd, run_cost

    cost = run_cost(scenario, trajectories=trajectories, workers=workers or 1)
    refuse_absurd(scenario, cost)
    for text in cost_warnings(cost):
        print(f"grmc: warning: {scenario.source}: {text}", file=sys.stderr)


def _default_output(scenario_path: str, suffix: str = "") -> Path:
    return Path("outputs") / f"{Path(scenario_path).stem}{suffix}.nc"


def _json_ready(obj):
    """Replace non-finite floats by None, recursively."""
    if isinstance(obj, float):
        return obj if obj == obj and abs(obj) != float("inf") else None
    if isinstance(obj, dict):
        return {k: _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_ready(v) for v in obj]
    return obj


# ------------------------------------------------------------------------------ commands
def cmd_check(args) -> int:
    from .summary import format_summary, summarize

    scenario = load_scenario(args.scenario)
    info = summarize(scenario)
    if args.json:  # JSON has no NaN: an undefined value is null
        print(json.dumps(_json_ready(info), indent=2, allow_nan=False))
    else:
        print(format_summary(info))
    return EXIT_OK


def cmd_run(args) -> int:
    from .dataset import save
    from .report import format_run_table
    from .simulate import run

    scenario = load_scenario(args.scenario)
    out = _output_file(args.output, _default_output(args.scenario))
    _refuse_absurd_run(scenario, args.trajectories, args.workers)
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

    res = _read_output(args.file)
    path = Path(args.file)
    outdir = _output_folder(args.output, path.parent)
    written = plot_all(res, outdir, stem=path.stem)
    if not written:
        raise UsageError(f"{path}: nothing to draw (no spectrum, transient, histogram, "
                         "population, event rates or sweep deviations in the file)")
    for p in written:
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
    from .export import export_csv, export_spice, export_verilog_a

    path = Path(args.file)
    ds = _read_output(args.file).ds
    _output_file(args.output, Path(args.output or "."))
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

    from .report import format_exact_table

    scenario = load_scenario(args.scenario)
    check_counts(scenario)
    out = _output_file(args.output, _default_output(args.scenario, "_exact"))
    ds = exact_dataset(scenario, command=args.command_line)
    save(ds, out)
    print(format_exact_table(ds))
    print(f"wrote {out}")
    return EXIT_OK


def _sweep_accuracy(args) -> float:
    """``--accuracy`` of a sweep (the chooser's target per point), checked (exit 2)."""
    from .sweep import DEFAULT_ACCURACY

    if args.accuracy is None:
        return DEFAULT_ACCURACY
    ns = argparse.Namespace(scenario=args.scenario, accuracy=args.accuracy, band=None,
                            max_seconds=None)
    return _accuracy_options(ns)["accuracy"]


def cmd_sweep(args) -> int:
    from .report import format_sweep_point
    from .sweep import SchedulerUnreachable, parse_vary, parts_dir, round_integers, run_sweep

    scenario = load_scenario(args.scenario)
    varies = []
    for text in args.vary:
        try:
            vary, note = round_integers(parse_vary(text))
        except ValueError as exc:
            raise UsageError(f"--vary: {exc}") from None
        if note:
            print(f"grmc: warning: {note}", file=sys.stderr)
        varies.append(vary)
    out = _output_file(args.output, _default_output(args.scenario, "_sweep"))
    if args.resume and not parts_dir(out).exists():
        print(f"grmc: note: nothing to resume ({parts_dir(out)} does not exist); "
              "starting the sweep afresh", file=sys.stderr)

    def report(res: dict) -> None:
        print(format_sweep_point(res, res.get("assignment", {})), flush=True)

    try:
        run_sweep(scenario, varies, out, scheduler=args.scheduler, resume=args.resume,
                  workers=args.workers, command=args.command_line,
                  noise_frequencies=tuple(args.frequency) if args.frequency else None,
                  on_point=report, accuracy=_sweep_accuracy(args))
    except SchedulerUnreachable as exc:
        print(f"grmc: error: {exc}", file=sys.stderr)
        return EXIT_FAIL
    except KeyboardInterrupt as exc:
        how = "terminated" if isinstance(exc, Terminated) else "interrupted"
        print(f"grmc: {how}; finished points are kept in {parts_dir(out)}, "
              "run the same command with --resume to continue", file=sys.stderr)
        return EXIT_TERMINATED if isinstance(exc, Terminated) else EXIT_INTERRUPTED
    print(f"wrote {out}")
    return EXIT_OK


def _settings(args) -> dict[str, float]:
    """``--set KEY=NUMBER`` (repeatable) as a dict; exit 2 naming the option when malformed."""
    out = {}
    for text in args.set or ():
        key, sep, value = text.partition("=")
        try:
            out[key.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep or not key.strip():
            raise UsageError(f"{args.scenario}: --set: expected KEY=NUMBER (e.g. "
                             f"volume.volume_cm3=1e-18), got {text!r}")
    return out


def cmd_solve(args) -> int:
    from .dataset import save
    from .report import format_solve_table
    from .solve import choose_method, solve_with
    from .sweep import point_scenario

    scenario = load_scenario(args.scenario)
    settings = _settings(args)
    if settings:
        scenario = point_scenario(scenario, settings)
    check_counts(scenario)
    target = _accuracy_options(args)
    out = _output_file(args.output, _default_output(args.scenario, "_solve"))
    method, reason = choose_method(scenario, target["accuracy"], max_states=args.max_states)
    print(f"method: {method}, because {reason}", flush=True)
    if method != "monte-carlo":
        ds = solve_with(method, reason, scenario, seed=args.seed, workers=args.workers,
                        max_states=args.max_states, command=args.command_line, **target)
        save(ds, out)
    else:
        _refuse_absurd_run(scenario, None, args.workers)
        with _chunk_runner(args, out) as runner:  # --scheduler, --resume
            ds = solve_with(method, reason, scenario, seed=args.seed, workers=args.workers,
                            max_states=args.max_states, command=args.command_line,
                            runner=runner, **target)
            save(ds, out)
            runner.finish()
    print(format_solve_table(ds))
    print(f"wrote {out}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from .demo import demo_scenario_path, run_demo

    outdir = _output_folder(args.output, Path("outputs"))
    _refuse_absurd_run(load_scenario(demo_scenario_path()), None, args.workers)
    run_demo(outdir, workers=args.workers, command=args.command_line)
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


def _add_solve(sub) -> None:
    """The ``grmc solve`` subcommand's options."""
    p = sub.add_parser("solve", help="the answer to a stated accuracy at any volume: the "
                       "method (exact, linear noise or Monte Carlo) chosen and justified")
    p.add_argument("scenario", help="scenario file (TOML)")
    p.add_argument("--accuracy", metavar="REL", required=True,
                   help="relative accuracy wanted of the means, variances and spectra "
                        "(0 < REL < 1, e.g. 0.05)")
    p.add_argument("-o", "--output", help="output file (default outputs/<stem>_solve.nc)")
    p.add_argument("--max-states", type=_positive_int, default=200_000, metavar="N",
                   help="largest state space given to the master equation (default 200000)")
    p.add_argument("--band", metavar="F1:F2",
                   help="Monte Carlo: band [Hz] the spectra must reach the accuracy in")
    p.add_argument("--max-seconds", metavar="S",
                   help="Monte Carlo: time budget of the rounds (default 600)")
    p.add_argument("--seed", type=_nonneg_int, help="Monte Carlo: override [run] seed")
    p.add_argument("--workers", type=_positive_int, help="Monte Carlo: threads (default: "
                   "all cores)")
    p.add_argument("--set", action="append", metavar="KEY=NUMBER",
                   help="set section.key (or traps.<label>.key) of the scenario, e.g. "
                        "volume.volume_cm3=1e-18; repeatable")
    _scale_out_options(p)
    p.set_defaults(func=cmd_solve)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
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

    _add_solve(sub)

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
    p.add_argument("--accuracy", metavar="REL",
                   help="accuracy given to the method chooser of each point (exact, linear "
                        "noise or Monte Carlo; default 0.05)")
    p.add_argument("-o", "--output", help="output file (default outputs/<stem>_sweep.nc)")
    p.set_defaults(func=cmd_sweep)

    p = sub.add_parser("demo", help="run the bundled demo end to end into outputs/")
    p.add_argument("-o", "--output", help="folder (default outputs/)")
    p.add_argument("--workers", type=_positive_int, help="threads (default: all cores)")
    p.set_defaults(func=cmd_demo)
    return parser


def _known_refusal(exc: Exception) -> bool:
    """The solvers' refusals of a case they cannot handle (bad input, exit 2)."""
    from .continuum import ContinuumError
    from .exact import ExactRefusal

    return isinstance(exc, (ContinuumError, ExactRefusal))


def _dispatch(args) -> int:
    where = getattr(args, "scenario", None) or getattr(args, "file", "")
    try:
        return args.func(args)
    except (ScenarioError, UsageError) as exc:
        print(f"grmc: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except CommandFailed as exc:
        kind = "" if exc.status == EXIT_INTERRUPTED else "error: "
        print(f"grmc: {kind}{exc}", file=sys.stderr)
        return exc.status
    except Terminated:
        print("grmc: terminated; no output written", file=sys.stderr)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        print("grmc: interrupted; no output written", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # pragma: no cover - e.g. piped into head
        return EXIT_OK
    except (OSError, MemoryError) as exc:  # the environment failed, not the input
        text = f"{exc.strerror}: {exc.filename}" if getattr(exc, "filename", None) else exc
        print(f"grmc: error: {where}: {type(exc).__name__}: {text}", file=sys.stderr)
        return EXIT_FAIL
    except Exception as exc:
        if _known_refusal(exc):
            print(f"grmc: error: {where}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        raise


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``grmc`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    args.command_line = _command_line(argv)
    previous = signal.getsignal(signal.SIGTERM)
    try:
        signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (e.g. called from a worker): leave it alone
        previous = None
    try:
        return _dispatch(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
