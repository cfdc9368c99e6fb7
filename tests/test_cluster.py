"""One ensemble on a Dask cluster, and interrupted runs resumed.

The reference of every data check here is the same run done locally on one thread: trajectory
i draws only from the streams spawned from (seed, i) and chunk results are merged in chunk
order, so a run on any cluster, with lost workers or resumed from kept chunks, must give
identical numbers (bit for bit), not merely statistically close ones.  One check also ties
the cluster run to the physics: the birth-death volume's stationary mean equals g/k, the
mean of its Poisson law (van Kampen, Stochastic Processes in Physics and Chemistry, 2007,
ch. VI), within 4 of the run's own standard errors (spread of the per-trajectory time
averages over sqrt(trajectories)); fixed seed.

One LocalCluster with two process workers (``processes=True``, no dashboard) serves the whole
module: starting one costs seconds.
"""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest
from birth_death import birth_death_box

import grmc
import grmc.distributed as distributed
from grmc.cli import main
from grmc.dataset import load
from grmc.distributed import open_runner
from grmc.parts import parts_dir

Z = 4.0  # z-score bound of the one statistical check (two-sided p = 6e-5)
#: Poisson mean of the birth-death box: g/k with g = G V = 1e5 /s and k = B A = 1e4 /s
#: (tests/birth_death.py; common practice for a linear birth-death process).
POISSON_MEAN = 1.0e20 * 1.0e-15 / (1.0e-16 * 1.0e20)


def _text(trajectories: int = 32, seed: int = 3) -> str:
    return birth_death_box(title="birth-death on a cluster", more=f"""
[run]
trajectories = {trajectories}
duration_s = 5.0e-3
samples = 512
settle_s = 5.0e-4
seed = {seed}
""")


def _same_data(a, b) -> None:
    assert list(a.data_vars) == list(b.data_vars)
    for name in a.data_vars:
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


@pytest.fixture(scope="module")
def cluster():
    from dask.distributed import Client, LocalCluster

    # no dashboard; the scheduler's small HTTP server on a free local port (its default,
    # 8787, may be taken by another cluster on the machine)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as lc, \
            Client(lc, set_as_default=False) as client:
        yield lc, client


@pytest.fixture(scope="module")
def local_run():
    """The reference: the same scenario and seed on one local thread."""
    return grmc.run(grmc.load_scenario(text=_text()), workers=1, progress=False)


def test_a_cluster_run_gives_the_local_run_data(cluster, local_run):
    lc, _ = cluster
    with open_runner(None, scheduler=lc.scheduler_address) as runner:
        ds = grmc.run(grmc.load_scenario(text=_text()), runner=runner, progress=False)
    assert runner.computed == 8  # 32 trajectories in chunks of 4, all on the cluster
    _same_data(ds, local_run)
    e = ds.sel(species="electrons")
    assert abs(float(e["stationary_mean"]) - POISSON_MEAN) < Z * float(
        e["stationary_mean_stderr"])


def test_a_worker_killed_mid_run_still_gives_identical_data(cluster, local_run):
    """SIGKILL one worker process when the first chunk comes back: Dask recomputes its
    chunks (and the plan it held) elsewhere and the data do not change."""
    lc, client = cluster
    before = client.run(os.getpid)
    victim = sorted(before.values())[0]
    seen = []

    def kill_once(runner):
        seen.append(runner.computed)
        if len(seen) == 1:
            os.kill(victim, signal.SIGKILL)

    with open_runner(None, scheduler=lc.scheduler_address) as runner:
        runner.hook = kill_once
        ds = grmc.run(grmc.load_scenario(text=_text()), runner=runner, progress=False)
    assert len(seen) == 8 and seen[0] == 1  # the kill came with 7 chunks still to do
    _same_data(ds, local_run)
    client.wait_for_workers(2, timeout=120)  # the nanny restarts it for the next tests
    assert victim not in client.run(os.getpid).values()


class _StopAfter:
    """A hook that interrupts the run (as Ctrl-C would) after ``n`` chunks."""

    def __init__(self, n: int):
        self.n = n

    def __call__(self, runner):
        if runner.computed >= self.n:
            raise KeyboardInterrupt


def _interrupting(monkeypatch, n: int) -> list:
    """Make the runners the CLI opens stop after ``n`` chunks; returns the runners made."""
    made = []
    original = distributed.ChunkRunner

    def runner(*args, **kwargs):
        r = original(*args, **kwargs)
        r.hook = _StopAfter(n) if n else None
        made.append(r)
        return r

    monkeypatch.setattr(distributed, "ChunkRunner", runner)
    return made


def test_an_interrupted_cluster_run_resumed_gives_identical_data(cluster, local_run, tmp_path,
                                                                 monkeypatch, capsys):
    lc, _ = cluster
    (tmp_path / "bd.toml").write_text(_text())
    out = tmp_path / "bd.nc"
    argv = ["run", str(tmp_path / "bd.toml"), "-o", str(out), "-q", "--scheduler",
            lc.scheduler_address]
    _interrupting(monkeypatch, 3)
    assert main(argv) == 130
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "to continue, run: grmc " + " ".join(argv) + " --resume" in err[0]
    assert not out.exists()
    kept = len(list(parts_dir(out).glob("chunk_*.pkl")))
    assert kept >= 3
    made = _interrupting(monkeypatch, 0)
    assert main([*argv, "--resume"]) == 0
    assert made[0].loaded == kept and made[0].computed == 8 - kept  # nothing done twice
    _same_data(load(out), local_run)
    assert not parts_dir(out).exists()  # removed once the file is written


def test_an_interrupted_local_run_resumed_gives_identical_data(local_run, tmp_path,
                                                               monkeypatch, capsys):
    (tmp_path / "bd.toml").write_text(_text())
    out = tmp_path / "bd.nc"
    argv = ["run", str(tmp_path / "bd.toml"), "-o", str(out), "-q", "--workers", "2"]
    _interrupting(monkeypatch, 2)
    assert main(argv) == 130
    assert "--resume" in capsys.readouterr().err
    made = _interrupting(monkeypatch, 0)
    assert main([*argv, "--resume"]) == 0
    assert made[0].loaded >= 2 and made[0].loaded + made[0].computed == 8
    _same_data(load(out), local_run)
    assert not parts_dir(out).exists()


@pytest.mark.parametrize("change", [["--seed", "4"], ["--trajectories", "16"], "scenario"])
def test_a_resume_of_a_different_run_is_refused_with_exit_2(tmp_path, monkeypatch, capsys,
                                                            change):
    """Kept chunks belong to one scenario, seed and plan: anything else is refused in one
    line naming the parts folder (exit 2, common practice for bad input), and so is a new
    run over them without --resume; the parts stay."""
    scen = tmp_path / "bd.toml"
    scen.write_text(_text())
    out = tmp_path / "bd.nc"
    argv = ["run", str(scen), "-o", str(out), "-q", "--workers", "1"]
    _interrupting(monkeypatch, 1)
    assert main(argv) == 130
    _interrupting(monkeypatch, 0)
    capsys.readouterr()
    if change == "scenario":
        scen.write_text(_text().replace("generation_cm3_s = 1.0e20", "generation_cm3_s = 2.0e20"))
        change = []
    assert main([*argv, *change, "--resume"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(parts_dir(out)) in err[0] and "different run" in err[0]
    assert main([*argv, *change]) == 2
    assert "--resume" in capsys.readouterr().err
    assert not out.exists() and parts_dir(out).is_dir()


def test_resume_with_nothing_to_resume_says_so_and_runs(tmp_path, capsys, local_run):
    (tmp_path / "bd.toml").write_text(_text())
    out = tmp_path / "bd.nc"
    assert main(["run", str(tmp_path / "bd.toml"), "-o", str(out), "-q", "--resume"]) == 0
    assert "nothing to resume" in capsys.readouterr().err
    _same_data(load(out), local_run)


def test_an_unreachable_scheduler_fails_in_one_line_leaving_nothing(tmp_path, capsys):
    """A port where nothing listens: exit 1 (a failure, not bad input), one line, no output
    file and no parts folder."""
    import socket

    with socket.socket() as s:  # a free port, closed again: nothing listens there
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    (tmp_path / "bd.toml").write_text(_text())
    out = tmp_path / "sub" / "bd.nc"
    t0 = time.perf_counter()
    code = main(["run", str(tmp_path / "bd.toml"), "-o", str(out), "--scheduler",
                 f"tcp://127.0.0.1:{port}"])
    waited = time.perf_counter() - t0
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1 and f"127.0.0.1:{port}" in err[0], (err, waited)
    assert not (tmp_path / "sub").exists()
    assert main(["run", str(tmp_path / "bd.toml"), "-o", str(out), "--scheduler",
                 "tcp://no-port-here"]) == 2  # an address Dask cannot read: bad input


def test_adaptive_rounds_on_the_cluster_stop_where_the_local_run_stops(cluster):
    """Each round's chunks go to the cluster: the same rounds, the same final count and the
    same data as the rounds run locally (test_accuracy's setting)."""
    lc, _ = cluster
    scen = grmc.load_scenario(text=birth_death_box(
        title="birth-death to an accuracy", more="[run]\ntrajectories = 16\nseed = 4\n"))
    options = dict(accuracy=0.12, band_Hz=(200.0, 2.0e4), progress=False)
    local = grmc.run(scen, workers=1, **options)
    with open_runner(None, scheduler=lc.scheduler_address) as runner:
        remote = grmc.run(scen, runner=runner, **options)
    assert local.attrs["rounds"] >= 2
    for key in ("rounds", "trajectories", "accuracy_reached", "accuracy_stop"):
        assert remote.attrs[key] == local.attrs[key], key
    assert runner.computed == int(local.attrs["trajectories"]) // 4
    _same_data(remote, local)


def test_grmc_solve_on_the_cluster_gives_the_local_data(cluster, tmp_path):
    """`grmc solve --scheduler`: when the chooser runs Monte Carlo (the ladder's 1e-16 cm^3
    rung with the master equation limited to 100 states, as in tests/test_solve.py), the
    rounds' chunks go to the cluster and the file equals a local solve with the same seed."""
    from test_solve import LADDER, ladder

    from grmc.solve import solve

    lc, _ = cluster
    scen = ladder(1.0e-16)
    out = tmp_path / "rung_solve.nc"
    assert main(["solve", str(LADDER), "--set", "volume.volume_cm3=1e-16", "--accuracy", "0.2",
                 "--max-states", "100", "--seed", "3", "--scheduler", lc.scheduler_address,
                 "-o", str(out)]) == 0
    remote = load(out)
    local = solve(scen, 0.2, max_states=100, seed=3, workers=1, progress=False)
    assert remote.attrs["method"] == "monte-carlo"
    for key in ("rounds", "trajectories", "accuracy_reached"):
        assert remote.attrs[key] == local.attrs[key], key
    for name in ("stationary_mean", "stationary_var", "psd_band", "psd"):
        np.testing.assert_array_equal(remote[name].values, local[name].values, err_msg=name)
    assert not parts_dir(out).exists()
