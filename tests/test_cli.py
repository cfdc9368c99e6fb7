"""The command line: bad input exits 2 with one clear message; help is cheap."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from cli_boxes import BOX, SMALL, write_scenario

from grmc.cli import main

GOOD = BOX.format(title="cli box")
_write = write_scenario


BAD_CASES = [
    ("negative coefficient", ("radiative_cm3_s = 1.0e-10", "radiative_cm3_s = -1.0e-10"),
     "[material] radiative_cm3_s"),
    ("misspelt key", ("acceptors_cm3", "acceptor_cm3"), "[material] acceptor_cm3"),
    ("size and volume", ("volume_cm3 = 1.0e-15", "volume_cm3 = 1.0e-15\nsize_nm = [5, 5, 5]"),
     "[volume] volume_cm3"),
    ("zero volume", ("volume_cm3 = 1.0e-15", "volume_cm3 = 0.0"), "[volume] volume_cm3"),
    ("duplicate trap label", ("[run]", GOOD[GOOD.index("[[traps]]"):GOOD.index("[run]")]
                              + "[run]"), "[traps.deep] label"),
]


@pytest.mark.parametrize("name, edit, where", BAD_CASES, ids=[c[0] for c in BAD_CASES])
@pytest.mark.parametrize("command", ["check", "run"])
def test_bad_scenario_exits_2_naming_the_key(tmp_path, capsys, name, edit, where, command):
    path = _write(tmp_path, GOOD.replace(*edit, 1))
    out = tmp_path / "out.nc"
    argv = [command, str(path)] + (["-o", str(out)] if command == "run" else [])
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert where in err and str(path) in err
    assert "Traceback" not in err and err.count("\n") == 1
    assert not out.exists() and not list(tmp_path.glob("*.part"))


def test_not_toml_and_missing_file(tmp_path, capsys):
    path = _write(tmp_path, "title = [unclosed\n")
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "not valid TOML" in err and str(path) in err
    assert main(["check", str(tmp_path / "nope.toml")]) == 2
    err = capsys.readouterr().err
    assert "no such file" in err and "nope.toml" in err


def test_bad_scenario_in_a_fresh_process_has_no_traceback(tmp_path):
    path = _write(tmp_path, GOOD.replace("acceptors_cm3", "acceptor_cm3"))
    proc = subprocess.run([sys.executable, "-m", "grmc", "check", str(path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "[material] acceptor_cm3" in proc.stderr and "did you mean" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_bad_argument_exits_2(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["run", "x.toml", "--trajectories", "0"])
    assert exc.value.code == 2


def test_help_imports_nothing_heavy():
    code = ("import sys; import grmc, grmc.cli; "
            "heavy = [m for m in ('numba', 'xarray', 'matplotlib', 'dask', 'scipy') "
            "if m in sys.modules]; print(heavy)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert proc.stdout.strip() == "[]", proc.stdout + proc.stderr


def test_check_json_has_the_contract_keys(tmp_path, capsys):
    path = _write(tmp_path, GOOD)
    assert main(["check", str(path), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    for key in ("volume_cm3", "species", "steady_continuum", "var_lna", "counts"):
        assert key in info
    assert info["species"] == ["electrons", "holes", "trapped:deep"]
    assert info["counts"]["acceptors"] == 100 and info["counts"]["T_deep"] == 20
    assert set(info["steady_continuum"]) == set(info["species"])


def test_exact_command_writes_the_contract(tmp_path, capsys):
    """`grmc exact` writes the same names as `run` where they mean the same thing and reports
    the probability outside its truncation (the exact values themselves are checked against
    published results in test_exact.py)."""
    from grmc.dataset import load

    path = _write(tmp_path, SMALL)
    out = tmp_path / "exact.nc"
    assert main(["exact", str(path), "-o", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "probability outside" in printed
    ds = load(out)
    # the exact mean and variance of each species beside the continuum and LNA values
    for i, name in enumerate(ds["species"].values):
        row = [ln.split() for ln in printed.splitlines() if ln.split()[:1] == [str(name)]][0]
        exact_mean, continuum = float(row[1]), float(row[3])
        assert exact_mean == pytest.approx(float(ds["stationary_mean"][i]), rel=1e-5)
        assert continuum == pytest.approx(float(ds["steady_continuum"][i]), rel=1e-5)
    for name in ("stationary_mean", "stationary_var", "steady_continuum", "var_lna", "psd",
                 "psd_lna"):
        assert name in ds, name
    assert ds["psd"].dims == ("species", "frequency")
    assert float(ds["probability_outside"]) < 1e-9
    assert "probability_outside" in ds.attrs
    assert main(["plot", str(out), "-o", str(tmp_path / "png")]) == 0
    assert list((tmp_path / "png").glob("*.png"))


def test_run_plot_export_round(tmp_path, capsys):
    from grmc.export import read_noise_table

    path = _write(tmp_path, GOOD.replace("[run]", "[readout]\nbias_V = 1.0\nlength_cm = 1e-4\n"
                                         "electron_mobility_cm2_Vs = 1000.0\n"
                                         "hole_mobility_cm2_Vs = 400.0\n[run]"))
    out = tmp_path / "r.nc"
    assert main(["run", str(path), "-o", str(out), "--workers", "2"]) == 0
    printed = capsys.readouterr().out
    assert "MC mean" in printed and "continuum" in printed and f"wrote {out}" in printed
    csv = tmp_path / "i.csv"
    assert main(["export", str(out), "--format", "csv", "-o", str(csv)]) == 0
    # the header names the units of the columns as written (A^2/Hz for a current)
    assert "# units: frequency in Hz; spectral densities in A^2/Hz\n" in csv.read_text()
    va = tmp_path / "i.va"
    assert main(["export", str(out), "--format", "verilog-a", "-o", str(va)]) == 0
    f, s = read_noise_table(va)
    assert np.all(np.diff(f) > 0) and np.all(s > 0)
    assert main(["export", str(out), "--format", "csv", "--quantity", "protons",
                 "-o", str(csv)]) == 2
    assert "protons" in capsys.readouterr().err
    assert main(["export", str(tmp_path / "none.nc"), "--format", "csv", "-o", str(csv)]) == 2


def test_demo_end_to_end(tmp_path, capsys):
    """`grmc demo` runs the bundled scenario, plots and exports, and says where they are."""
    from grmc.demo import run_demo

    got = run_demo(tmp_path, workers=2)
    printed = capsys.readouterr().out
    assert got["netcdf"].is_file() and len(got["plots"]) >= 4 and len(got["exports"]) >= 2
    for p in [got["netcdf"], *got["plots"], *got["exports"]]:
        assert str(p) in printed


@pytest.mark.parametrize("path", sorted(Path(__file__).resolve().parents[1]
                                        .joinpath("scenarios").glob("*.toml")),
                         ids=lambda p: p.stem)
def test_bundled_scenarios_check(path, capsys):
    """Every bundled scenario is valid and `check` explains it."""
    assert main(["check", str(path)]) == 0
    assert "relaxation times" in capsys.readouterr().out
