"""Sweeps: parsing, deviation shrinking with volume, Dask cluster, interrupt and resume."""

from __future__ import annotations

import numpy as np
import pytest

import grmc
from grmc.dataset import load
from grmc.exact import pair_reaction_exact
from grmc.sweep import crossing_count, parse_vary, run_sweep

PAIR = """
title = "pair reaction sweep"
[material]
temperature_K = 300.0
intrinsic_density_cm3 = 1.0e10
radiative_cm3_s = 1.0e-10
[volume]
volume_cm3 = 1.0e-10
[run]
trajectories = 8
duration_s = 10.0
samples = 128
seed = 4
"""


def test_parse_vary():
    v = parse_vary("volume.volume_cm3=1e-12:1e-10:3:log")
    np.testing.assert_allclose(v.values, [1e-12, 1e-11, 1e-10])
    v = parse_vary("light.generation_cm3_s=0:10:3")
    np.testing.assert_allclose(v.values, [0, 5, 10])
    for bad in ("volume.volume_cm3", "a=1:2", "a=x:2:3", "a=0:1:3:log", "a=1:2:0"):
        with pytest.raises(ValueError):
            parse_vary(bad)


def test_unknown_swept_key_exits_2(tmp_path, capsys):
    from grmc.cli import main

    path = tmp_path / "s.toml"
    path.write_text(PAIR)
    out = tmp_path / "sw.nc"
    code = main(["sweep", str(path), "--vary", "material.radiatve_cm3_s=1:2:2", "-o", str(out)])
    assert code == 2
    err = capsys.readouterr().err
    assert "[material] radiatve_cm3_s" in err and "did you mean" in err
    assert not out.exists()


def test_crossing_count():
    counts = np.array([1000.0, 100.0, 10.0, 1.0])
    dev = np.array([0.001, 0.01, 0.1 * 10 ** 0.5, 1.0])
    got = crossing_count(counts, dev)
    # log-linear interpolation between (100, 0.01) and (10, 0.316): 0.1 at 10**(2 - 2/3)
    assert got == pytest.approx(10 ** (2 - 2 / 3), rel=1e-9)
    assert crossing_count(counts, dev * 0) is None


def test_volume_sweep_on_local_cluster_resume_and_deviation(tmp_path):
    """A volume sweep of the pair reaction, run exactly on a dask LocalCluster: the exact mean
    equals the Bessel answer (Darvey, Ninham & Staff, J. Chem. Phys. 45, 2145, 1966), the
    deviation from the continuum shrinks as the counts grow, and an interrupted sweep that is
    resumed gives the same data as an uninterrupted one."""
    scen = grmc.load_scenario(text=PAIR)
    vary = [parse_vary("volume.volume_cm3=2e-11:2e-9:3:log")]
    whole = run_sweep(scen, vary, tmp_path / "whole.nc", workers=2)
    part = tmp_path / "part.nc"
    run_sweep(scen, vary, part, workers=1, max_points=1)  # an "interrupted" sweep
    assert not part.exists() and (tmp_path / "part.nc.parts").is_dir()
    run_sweep(scen, vary, part, workers=2, resume=True)
    a, b = load(whole), load(part)
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    assert list(a["method"].values) == ["exact"] * 3
    holes = a.sel(species="holes")
    for vol, mean in zip(a["volume.volume_cm3"].values, holes["stationary_mean"].values):
        lam = (1.0e10 * vol) ** 2  # lambda = n_i^2 V^2
        assert mean == pytest.approx(pair_reaction_exact(lam, 0)[0], rel=1e-8)
    dev = np.abs(holes["deviation_mean"].values)
    # lambda = 0.04, 4, 400: the Bessel ratio gives |deviation| ~ 0.81, ~0.12, ~1/(4 sqrt(400))
    assert np.all(np.diff(dev) < 0) and dev[-1] < 0.02 and dev[0] > 0.5


def test_point_falls_back_to_monte_carlo():
    """Where the exact state space is too large a sweep point runs the Monte Carlo ensemble
    instead, and records which; its mean agrees with the Bessel answer within its standard
    error (Darvey, Ninham & Staff 1966)."""
    from grmc.sweep import evaluate_point, point_scenario

    scen = point_scenario(grmc.load_scenario(text=PAIR.replace("trajectories = 8",
                                                               "trajectories = 32")),
                          {"volume.volume_cm3": 2.0e-10})
    res = evaluate_point(scen, 0, exact_limit=5)
    assert res["method"] == "monte-carlo"
    h = res["species"].index("holes")
    mean_h, _ = pair_reaction_exact(4.0, 0)
    assert abs(res["mean"][h] - mean_h) < 4 * res["mean_err"][h]
    assert res["mean_err"][h] > 0 and np.isfinite(res["tau"][h])


def test_sweep_attaches_to_a_running_scheduler(tmp_path):
    """`--scheduler ADDRESS`: the sweep runs on an existing Dask cluster and gives the same
    data as on its own local cluster (points are seeded from (seed, index) only)."""
    from dask.distributed import LocalCluster

    scen = grmc.load_scenario(text=PAIR)
    vary = [parse_vary("volume.volume_cm3=1e-10:2e-10:2")]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=None,  # HTTP on a free port: 8787 may be taken
                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as cluster:
        remote = run_sweep(scen, vary, tmp_path / "remote.nc", scheduler=cluster.scheduler_address)
    local = run_sweep(scen, vary, tmp_path / "local.nc", workers=1)
    a, b = load(remote), load(local)
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


def test_one_line_per_point():
    """The line `grmc sweep` prints per finished point: the varied values, the method and the
    relative deviations value / reference - 1 (the definition in grmc.sweep's docstring)."""
    from grmc.report import format_sweep_point

    res = {"index": 2, "method": "exact", "species": ["electrons", "holes", "trapped:t"],
           "mean": [11.0, 5.0, 1.0], "continuum": [10.0, 5.0, 1.0],
           "var": [9.0, 0.0, 1.0], "var_lna": [10.0, 0.0, 2.0]}
    line = format_sweep_point(res, {"volume.volume_cm3": 1e-15, "traps.t.count": 2.0})
    assert line.startswith("point 3: volume.volume_cm3=1e-15, traps.t.count=2  [exact]")
    assert "electrons mean +10.0 % var -10.0 %" in line
    assert "holes mean +0.0 % var -" in line  # 0 / 0: no relative deviation to print
    assert "trapped" not in line and "\n" not in line
