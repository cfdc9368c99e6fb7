"""Every hostile input gets one line: exit 2 naming the file and the key or option for bad input,
exit 1 for a failing environment, 130/143 when interrupted or terminated, no traceback and
nothing half-written.

The limits checked here come from outside the project: IEEE 754 double precision holds
integers exactly below 2^53 and overflows above about 1.8e308 (common practice); the event
engine keeps its counts in doubles, so 2^52 is the largest count it is given; NetCDF
attributes are at most 64-bit signed integers (netCDF User Guide, common practice); the
netCDF default fill value of doubles is 9.969209968386869e36 (NC_FILL_DOUBLE, netCDF User
Guide).
"""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from cli_boxes import BOX, SMALL, write_scenario

from grmc.cli import main

BASE = BOX.format(title="hardening box")
_write = write_scenario


def _one_line(err: str) -> str:
    assert "Traceback" not in err, err
    assert err.count("\n") == 1, err
    return err


def _nothing_left(folder: Path) -> None:
    leftovers = [p.name for p in folder.rglob("*") if p.name.endswith(".part")
                 or p.name.endswith(".parts") or p.suffix in (".nc", ".png", ".csv", ".va")]
    assert leftovers == []


# ------------------------------------------------------------------ huge and overflowing values
HUGE = [
    ("density 1e300", ("acceptors_cm3 = 1.0e17", "acceptors_cm3 = 1e300"),
     "[material] acceptors_cm3"),
    ("volume 1e300", ("volume_cm3 = 1.0e-15", "volume_cm3 = 1e300"), "[volume] volume_cm3"),
    ("volume 1e-300", ("volume_cm3 = 1.0e-15", "volume_cm3 = 1e-300"), "[volume] volume_cm3"),
    ("trap energy 1e300", ("energy_eV = 0.1", "energy_eV = 1e300"), "[traps.deep] energy_eV"),
    ("temperature 1e-300", ("temperature_K = 300.0", "temperature_K = 1e-300"),
     "[material] temperature_K"),
    ("bias 1e300", ("[run]", "[readout]\nbias_V = 1e300\nlength_cm = 1e-4\n"
                    "electron_mobility_cm2_Vs = 1000.0\nhole_mobility_cm2_Vs = 400.0\n[run]"),
     "[readout] bias_V"),
    # counts past the engine's exact range (2^52), given or derived from density x volume
    ("trap count 2^63 - 1", ("count = 20", "count = 9223372036854775807"), "[traps.deep] count"),
    ("derived count past 2^52", ("volume_cm3 = 1.0e-15", "volume_cm3 = 0.5"),
     "[material] acceptors_cm3"),
    ("excess pairs past 2^52", ("[run]", "[start]\nexcess_pairs = 3000000000000000\n[run]"),
     "[start] excess_pairs"),
    # n_i exp(E/kT) at 4 K with a 0.3 eV level: exp(870) overflows a double
    ("emission density overflow", ("temperature_K = 300.0\n", "temperature_K = 4.0\n"),
     "[traps.deep] energy_eV"),
    ("seed 2^64", ("samples = 64", "samples = 64\nseed = 18446744073709551616"), "[run] seed"),
    ("seed 1e40", ("samples = 64", "samples = 64\nseed = 1e40"), "[run] seed"),
]


@pytest.mark.parametrize("name, edit, where", HUGE, ids=[c[0] for c in HUGE])
def test_huge_values_refused_naming_the_key(tmp_path, capsys, name, edit, where):
    text = BASE.replace(*edit, 1)
    if name == "emission density overflow":
        text = text.replace("energy_eV = 0.1", "energy_eV = 0.3")
    path = _write(tmp_path, text)
    assert main(["check", str(path)]) == 2
    err = _one_line(capsys.readouterr().err)
    assert where in err and str(path) in err
    out = tmp_path / "out.nc"
    assert main(["run", str(path), "-o", str(out)]) == 2
    assert where in _one_line(capsys.readouterr().err)
    _nothing_left(tmp_path)


def test_seed_option_past_int64_is_refused(tmp_path, capsys):
    path = _write(tmp_path, BASE)
    with pytest.raises(SystemExit) as exc:
        main(["run", str(path), "--seed", str(2**64)])
    assert exc.value.code == 2
    err = _one_line(capsys.readouterr().err)
    assert "--seed" in err and "grmc run --help" in err


# ------------------------------------------------------------------ absurd run costs
COSTLY = [
    ("1e12 samples", ("samples = 64", "samples = 1000000000000"), "[run] samples"),
    ("1e12 trajectories", ("trajectories = 4", "trajectories = 1000000000000"),
     "[run] trajectories"),
    ("1e300 s window", ("duration_s = 1.0e-7", "duration_s = 1e300"), "[run] duration_s"),
    ("1e300 s settling", ("samples = 64", "samples = 64\nsettle_s = 1e300"), "[run] settle_s"),
]


@pytest.mark.parametrize("name, edit, where", COSTLY, ids=[c[0] for c in COSTLY])
def test_absurd_cost_warned_by_check_refused_by_run(tmp_path, capsys, name, edit, where):
    path = _write(tmp_path, BASE.replace(*edit, 1))
    assert main(["check", str(path)]) == 0
    warnings = [ln for ln in capsys.readouterr().out.splitlines() if ln.startswith("warning:")]
    assert any(where in w and "refused by run" in w for w in warnings), warnings
    out = tmp_path / "out.nc"
    assert main(["run", str(path), "-o", str(out)]) == 2
    err = _one_line(capsys.readouterr().err)
    assert where in err and "refused" in err
    _nothing_left(tmp_path)


def test_trajectories_option_with_absurd_cost_is_refused(tmp_path, capsys):
    path = _write(tmp_path, BASE)
    assert main(["run", str(path), "--trajectories", str(10**12), "-o",
                 str(tmp_path / "o.nc")]) == 2
    assert "[run] trajectories" in _one_line(capsys.readouterr().err)


# ------------------------------------------------------------------ unwritable outputs
def _bad_outputs(tmp_path: Path) -> list[tuple[str, str]]:
    folder = tmp_path / "existing"
    folder.mkdir(exist_ok=True)
    # /proc is a virtual file system: no file can be created in it, even by root
    return [("", "empty"), (str(folder), "existing folder"),
            ("/proc/grmc-test/out.nc", "cannot write"), ("/proc/out.nc", "cannot write")]


@pytest.fixture(scope="module")
def exact_file(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("exact")
    out = folder / "small_exact.nc"
    assert main(["exact", str(_write(folder, SMALL)), "-o", str(out)]) == 0
    return out


@pytest.mark.parametrize("command", ["run", "exact", "export", "plot", "demo"])
def test_unwritable_output_refused_before_work(tmp_path, capsys, exact_file, command):
    scenario = _write(tmp_path, SMALL)
    for target, what in _bad_outputs(tmp_path):
        if command in ("run", "exact"):
            argv = [command, str(scenario), "-o", target]
        elif command == "export":
            argv = ["export", str(exact_file), "--format", "csv", "--quantity", "electrons",
                    "-o", target]
        elif command == "plot":
            if what == "existing folder":  # a folder is what plot wants: give a file instead
                target, what = str(scenario), "is a file"
            argv = ["plot", str(exact_file), "-o", target]
        else:
            if what == "existing folder":
                target, what = str(scenario), "is a file"
            argv = ["demo", "-o", target]
        assert main(argv) == 2, (command, target)
        err = _one_line(capsys.readouterr().err)
        assert "-o" in err and what.split()[-1] in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["existing", "s.toml"]


# ------------------------------------------------------------------ input files not from grmc
def _foreign_inputs(tmp_path: Path, exact_file: Path) -> list[tuple[Path, str]]:
    import xarray as xr

    text = _write(tmp_path, "frequency,psd\n1,2\n", "table.nc")
    empty = _write(tmp_path, "", "empty.nc")
    truncated = tmp_path / "truncated.nc"
    data = exact_file.read_bytes()
    truncated.write_bytes(data[: len(data) // 2])
    foreign = tmp_path / "foreign.nc"
    xr.Dataset({"temperature": ("x", np.arange(3.0))},
               attrs={"source": "a weather model"}).to_netcdf(foreign, engine="netcdf4")
    return [(text, "is not a NetCDF file"), (empty, "is empty"),
            (truncated, "damaged or truncated"), (foreign, "not a grmc output file")]


@pytest.mark.parametrize("command", ["plot", "export"])
def test_input_that_is_not_a_grmc_file(tmp_path, capsys, exact_file, command):
    for path, what in _foreign_inputs(tmp_path, exact_file):
        out = tmp_path / "out"
        argv = (["plot", str(path), "-o", str(out)] if command == "plot" else
                ["export", str(path), "--format", "csv", "-o", str(out) + ".csv"])
        assert main(argv) == 2, path
        err = _one_line(capsys.readouterr().err)
        assert str(path) in err and what in err, err
        assert not out.exists() and not Path(str(out) + ".csv").exists()


def test_plot_of_a_file_with_nothing_to_draw_fails(tmp_path, capsys):
    import xarray as xr

    from grmc.dataset import finish, save

    ds = finish(xr.Dataset({"probability_outside": ((), 1e-12)}), title="bare",
                scenario_toml="", command="test")
    path = save(ds, tmp_path / "bare.nc")
    assert main(["plot", str(path), "-o", str(tmp_path / "png")]) == 2
    err = _one_line(capsys.readouterr().err)
    assert "nothing to draw" in err and str(path) in err
    assert not (tmp_path / "png").exists()  # not even an empty folder


# ------------------------------------------------------------------ sweep options
def test_vary_key_without_section(tmp_path, capsys):
    path = _write(tmp_path, SMALL)
    out = tmp_path / "sw.nc"
    assert main(["sweep", str(path), "--vary", "volume_cm3=1e-10:2e-10:2", "-o", str(out)]) == 2
    err = _one_line(capsys.readouterr().err)
    assert "--vary" in err and "volume.volume_cm3" in err
    _nothing_left(tmp_path)


def test_fractional_values_into_an_integer_key_are_rounded_and_recorded():
    from grmc.sweep import parse_vary, round_integers

    vary, note = round_integers(parse_vary("traps.t.count=1.5:3.5:3"))
    # round half up (common practice), not Python's round-half-even
    assert vary.values == (2.0, 3.0, 4.0)
    assert "1.5 -> 2" in note and "traps.t.count" in note
    same, none = round_integers(parse_vary("volume.volume_cm3=1e-10:2e-10:2"))
    assert none is None and same.values == (1e-10, 2e-10)


def test_unreachable_scheduler_and_nothing_to_resume(tmp_path, capsys):
    path = _write(tmp_path, SMALL)
    out = tmp_path / "sw.nc"
    start = time.monotonic()
    code = main(["sweep", str(path), "--vary", "traps.t.count=1:2:2", "--resume",
                 "--scheduler", "tcp://127.0.0.1:9", "-o", str(out)])
    elapsed = time.monotonic() - start
    assert code == 1
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 2 and "nothing to resume" in lines[0]
    assert "--scheduler tcp://127.0.0.1:9" in lines[1]
    assert elapsed < 60  # a generous bound, not a speed check: it must not hang
    _nothing_left(tmp_path)


# ------------------------------------------------------------------ argparse
@pytest.mark.parametrize("argv, option", [(["run"], "scenario"), (["export", "x.nc"], "--format"),
                                          (["bogus"], "bogus"), (["sweep", "s.toml"], "--vary")])
def test_argparse_errors_are_one_line_with_a_hint(capsys, argv, option):
    with pytest.raises(SystemExit) as exc:
        main(argv)
    assert exc.value.code == 2
    err = _one_line(capsys.readouterr().err)
    assert err.startswith("grmc: error:") and option in err and "--help" in err
    assert "usage:" not in err


# ------------------------------------------------------------------ signals
# about 4e9 events (a minute or more): long enough to be interrupted mid-run
LONG = BASE.replace("trajectories = 4", "trajectories = 64").replace(
    "duration_s = 1.0e-7", "duration_s = 2.0e-2").replace(
    "[run]", "[light]\ngeneration_cm3_s = 1.0e24\n[run]")


def test_sigterm_is_handled_like_ctrl_c(tmp_path, capsys):
    """SIGTERM in the middle of a run: a clean message, exit 143, nothing written."""
    path = _write(tmp_path, LONG)
    out = tmp_path / "out.nc"
    timer = threading.Timer(4.0, os.kill, (os.getpid(), signal.SIGTERM))
    timer.start()
    try:
        code = main(["run", str(path), "-o", str(out), "-q", "--workers", "1"])
    finally:
        timer.cancel()
    assert code == 143
    err = _one_line(capsys.readouterr().err)
    assert "terminated" in err
    _nothing_left(tmp_path)


@pytest.mark.slow
def test_interrupted_sweep_prints_one_line(tmp_path):
    """Ctrl-C reaches the whole process group (the workers too): one line, exit 130."""
    # a population makes every point a Monte Carlo run of ~2.6e9 events, far longer than the
    # 15 s before the interruption (the exact solver would finish a plain point in time)
    path = _write(tmp_path, LONG.replace("count = 20", "count = 2000")
                  + "[population]\nfrequencies_Hz = [1.0e5]\n")
    out = tmp_path / "sw.nc"
    proc = subprocess.Popen([sys.executable, "-m", "grmc", "sweep", str(path), "--vary",
                             "run.seed=1:4:4", "--workers", "2", "-o", str(out)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    time.sleep(15.0)
    os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and err.count("\n") == 1, err
    assert "interrupted" in err and not out.exists()


# ------------------------------------------------------------------ failing environment
def test_a_failing_disk_is_one_line_and_exit_1(tmp_path, capsys, monkeypatch):
    import grmc.dataset

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(tmp_path / "out.nc"))

    monkeypatch.setattr(grmc.dataset, "save", full)
    path = _write(tmp_path, SMALL)
    assert main(["exact", str(path), "-o", str(tmp_path / "out.nc")]) == 1
    err = _one_line(capsys.readouterr().err)
    assert os.strerror(errno.ENOSPC) in err
    _nothing_left(tmp_path)


# ------------------------------------------------------------------ no NaN in files
def test_files_hold_the_fill_value_not_nan(tmp_path, capsys):
    """A level with no traps has no fluctuation: its undefined values are stored as the
    netCDF default fill value (documented in _FillValue), never as NaN, and read back as
    missing; ``check`` prints '-' for its Fano factor."""
    import netCDF4

    from grmc.dataset import FILL_VALUE

    assert FILL_VALUE == 9.969209968386869e36  # NC_FILL_DOUBLE, netCDF User Guide
    text = BASE.replace("count = 20", "count = 0")
    path = _write(tmp_path, text)
    assert main(["check", str(path)]) == 0
    row = [ln for ln in capsys.readouterr().out.splitlines() if "trapped:deep" in ln][0]
    assert "nan" not in row and " - " in row
    out = tmp_path / "r.nc"
    assert main(["run", str(path), "-o", str(out), "-q"]) == 0
    with netCDF4.Dataset(out) as nc:
        nc.set_auto_mask(False)
        filled = 0
        for name, var in nc.variables.items():
            if name in nc.dimensions:  # coordinates are always defined
                continue
            if var.dtype is not str and np.dtype(var.dtype).kind == "f":
                data = np.asarray(var[...])
                assert not np.any(np.isnan(data)), name
                assert var.getncattr("_FillValue") == FILL_VALUE, name
                filled += int(np.sum(data == FILL_VALUE))
    assert filled > 0  # the unresolved fits of the empty level are there, as fill values
    from grmc.result import read_dataset

    back = read_dataset(out)
    assert np.isnan(float(back["tau_spectrum"].sel(species="trapped:deep")[0]))


def test_sweep_deviation_of_an_empty_level_is_zero():
    """Value and reference both exactly 0 (nothing fluctuates): the relative deviation is
    defined as 0, not 0/0."""
    from grmc.sweep import _relative

    dev, err = _relative(np.array([0.0, 2.0]), np.array([0.0, 0.1]), np.array([0.0, 1.0]))
    assert dev.tolist() == [0.0, 1.0] and err.tolist() == [0.0, 0.1]


def test_every_exported_name_exists():
    """Each module's __all__ (the package's first) lists only names that exist, and the
    figures and the file schema do not reach into the modules downstream of them."""
    import importlib
    import pkgutil

    import grmc

    names = ["grmc"] + [f"grmc.{m.name}" for m in pkgutil.iter_modules(grmc.__path__)
                        if m.name != "__main__"]
    for name in names:
        module = importlib.import_module(name)
        missing = [n for n in getattr(module, "__all__", []) if not hasattr(module, n)]
        assert missing == [], (name, missing)
    import ast
    import inspect

    import grmc.dataset
    import grmc.plotting

    def relative_imports(module) -> list[str]:
        """'.x' for ``from .x import ...``; '.' + name for ``from . import name``."""
        out = []
        for node in ast.walk(ast.parse(inspect.getsource(module))):
            if isinstance(node, ast.ImportFrom) and node.level == 1:
                out += ([f".{node.module}"] if node.module else
                        [f".{a.name}" for a in node.names])
        return out

    assert not {".export", ".sweep"} & set(relative_imports(grmc.plotting))
    # the schema reads the version from its own module, not from the package's __init__
    assert ".__version__" not in relative_imports(grmc.dataset)
    assert "._version" in relative_imports(grmc.dataset)


def test_sweep_point_with_an_absurd_monte_carlo_cost_is_refused():
    """A point too large for the exact solver, and asked for an accuracy (1e-9) the linear
    noise cannot promise, falls back to Monte Carlo; when that run could never finish (a
    1e300 s window), the point is refused naming the key, not started."""
    from grmc.scenario import ScenarioError, load_scenario
    from grmc.sweep import evaluate_point

    scen = load_scenario(text=BASE.replace("duration_s = 1.0e-7", "duration_s = 1e300"))
    with pytest.raises(ScenarioError, match=r"\[run\] duration_s"):
        evaluate_point(scen, 0, exact_limit=1, accuracy=1e-9)


def test_scenario_error_survives_pickling():
    """Sweep points run in other processes: their refusals come back through pickle."""
    import pickle

    from grmc.scenario import ScenarioError

    err = ScenarioError("s.toml", "run", "duration_s", "too long")
    back = pickle.loads(pickle.dumps(err))
    assert type(back) is ScenarioError and str(back) == str(err)
    assert (back.section, back.key) == ("run", "duration_s")


def test_sweep_with_a_point_that_could_never_finish(tmp_path, capfd):
    """The refusal comes back from the worker as one line (capfd: the workers' own output
    too), exit 2, and the sweep leaves nothing behind when no point finished."""
    path = _write(tmp_path, BASE.replace("duration_s = 1.0e-7", "duration_s = 1e300")
                  .replace("intrinsic_density_cm3 = 1.0e10", "intrinsic_density_cm3 = 1.0e16"))
    out = tmp_path / "sw.nc"
    # about 1e7 electrons beside 1e9 holes: the electron count alone spans far more states
    # than the exact solver's limit, and at an accuracy of 1e-9 the linear noise cannot
    # answer either, so the points fall back to Monte Carlo, which could never finish
    assert main(["sweep", str(path), "--vary", "volume.volume_cm3=1e-8:2e-8:2",
                 "--accuracy", "1e-9", "--workers", "1", "-o", str(out)]) == 2
    captured = capfd.readouterr()
    err = _one_line(captured.err)
    assert "[run] duration_s" in err and "volume.volume_cm3=" in err
    _nothing_left(tmp_path)
