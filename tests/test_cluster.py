"""Clusters: the build cache's compile lock, the [execution.cluster] table, worker faults, and a real one-node SLURM.

The lock tests run real processes on a real directory. The fault tests run real Dask workers and kill
them. The ``cluster`` test brings up a one-node SLURM with ``tests/slurm.py`` (or skips, saying why),
runs ``configs/cluster-slurm.toml`` (with more replicates) through two worker jobs, cancels one mid-sweep,
and compares the store bitwise with a local run of the same file.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import xarray as xr
from cli_runs import tiny_network

from capsweep import locks
from capsweep.errors import ConfigError
from capsweep.results_schema.layout import TIMINGS
from capsweep.runners import builds
from capsweep.runners.task import TaskFailure
from capsweep.sweeps.dispatch import (
    WORKER_DEATH_TIMEOUT_S,
    batch_job_settings,
    cluster_table,
    dask_client,
    run_tasks,
)
from capsweep.sweeps.expand import expand
from capsweep.sweeps.identity import fingerprint
from capsweep.sweeps.launch import RunOptions, run_sweep
from capsweep.sweeps.sweepfile import parse_sweep

ROOT = Path(__file__).resolve().parents[1]
SLURM_SWEEP = ROOT / "configs" / "cluster-slurm.toml"
"""Wall-clock measurements: the only stored values that may differ between two runs of one sweep."""

KILL_SWEEP = """
[sweep]
name = "odour-worker-kill"
store = "{store}"
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2]
[execution]
workers = 2
""" + tiny_network()


# --- the compile lock -------------------------------------------------------------------------------------------

_COMPILER = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    from capsweep.runners.builds import locked
    root = Path(sys.argv[1])
    with locked(root / "k.lock"):
        entered = time.time()
        if not (root / "k" / "main").exists():
            with open(root / "compiles.log", "a") as log:
                log.write("compiled\\n")
            time.sleep(1.0)
            (root / "k").mkdir()
            (root / "k" / "main").write_text("binary")
        print(entered, time.time())
""")


def test_two_processes_compiling_one_key_compile_once_and_never_together(tmp_path: Path) -> None:
    runs = [subprocess.Popen([sys.executable, "-c", _COMPILER, str(tmp_path)], stdout=subprocess.PIPE, text=True)
            for _ in range(2)]
    spans = sorted(tuple(map(float, run.communicate(timeout=60)[0].split())) for run in runs)
    assert [run.returncode for run in runs] == [0, 0]
    assert (tmp_path / "compiles.log").read_text() == "compiled\n"
    assert spans[0][1] <= spans[1][0], f"both processes held the lock at once: {spans}"
    assert not (tmp_path / "k.lock").exists()  # released


def _holder(path: Path, **record: Any) -> None:
    path.mkdir()
    (path / "holder.json").write_text(json.dumps(record))


def _dead_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_a_lock_whose_holder_died_on_this_host_is_taken_over(tmp_path: Path) -> None:
    _holder(tmp_path / "dead.lock", host=socket.gethostname(), pid=_dead_pid(), heartbeat=time.time())
    _holder(tmp_path / "live.lock", host=socket.gethostname(), pid=os.getppid(), heartbeat=time.time())
    with builds.locked(tmp_path / "dead.lock", blocking=False) as taken:
        assert taken
        assert json.loads((tmp_path / "dead.lock" / "holder.json").read_text())["pid"] == os.getpid()
    with builds.locked(tmp_path / "live.lock", blocking=False) as taken:
        assert not taken


def test_a_lock_from_another_host_is_taken_over_only_once_its_heartbeat_is_old(tmp_path: Path) -> None:
    old = time.time() - locks.COMPILE.stale_after_s - 5
    _holder(tmp_path / "old.lock", host="odour-node-7", pid=1, heartbeat=old)
    _holder(tmp_path / "fresh.lock", host="odour-node-7", pid=1, heartbeat=time.time() - 5)
    with builds.locked(tmp_path / "old.lock", blocking=False) as taken:
        assert taken
    with builds.locked(tmp_path / "fresh.lock", blocking=False) as taken:
        assert not taken  # pid 1 means nothing on another host; only the heartbeat judges it


def test_the_holder_renews_its_heartbeat(tmp_path: Path) -> None:
    with locks.held(tmp_path / "k.lock", locks.Policy(renew_s=0.1, stale_after_s=300.0)):
        first = json.loads((tmp_path / "k.lock" / "holder.json").read_text())["heartbeat"]
        time.sleep(0.5)
        later = json.loads((tmp_path / "k.lock" / "holder.json").read_text())["heartbeat"]
    assert later - first >= 0.2


def test_a_lock_file_of_the_fcntl_era_is_replaced(tmp_path: Path) -> None:
    (tmp_path / "k.lock").write_text("")
    with builds.locked(tmp_path / "k.lock", blocking=False) as taken:
        assert taken and (tmp_path / "k.lock").is_dir()


# --- the [execution.cluster] table ------------------------------------------------------------------------------

def test_cluster_settings_stay_out_of_point_ids_and_the_grid_fingerprint() -> None:
    head = '[sweep]\nname = "odour"\nstore = "s.zarr"\n[[sweep.axis]]\nname = "n"\nkey = "assemblies.count"\nvalues = [1, 2]\n'
    local = parse_sweep(head)
    batch = parse_sweep(head + '[execution.cluster]\nkind = "slurm"\nmax_jobs = 9\nscratch = "/tmp/x"\n')
    assert batch.base["execution.cluster.max_jobs"] == 9
    assert [p.point_id for p in expand(local)] == [p.point_id for p in expand(batch)]
    assert fingerprint(local) == fingerprint(batch)


@pytest.mark.parametrize(("table", "named"), [
    ('kind = "cloud"', "execution.cluster.kind"),
    ("max_jobs = 0", "execution.cluster.max_jobs"),
    ('cores = "two"', "execution.cluster.cores"),
    ("walltime = 30", "execution.cluster.walltime_min"),  # did you mean
])
def test_a_bad_cluster_table_is_one_config_error_naming_the_key(table: str, named: str) -> None:
    with pytest.raises(ConfigError, match=named.replace(".", r"\.")) as caught:
        parse_sweep(f'[sweep]\nname = "odour"\nstore = "s.zarr"\n[execution.cluster]\n{table}\n')
    assert "\n" not in str(caught.value)


def test_the_command_line_cluster_options_are_checked_against_the_registry(tmp_path: Path) -> None:
    sweep = tmp_path / "sweep.toml"
    sweep.write_text(KILL_SWEEP.format(store=tmp_path / "s.zarr"))
    shown = subprocess.run([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep), "--cluster", "slurm",
                            "--cluster-set", "max_tries=0"], capture_output=True, text=True, timeout=120)
    assert shown.returncode != 0
    assert "execution.cluster.max_tries" in shown.stderr and "Traceback" not in shown.stderr, shown.stderr
    assert not (tmp_path / "s.zarr").exists()  # refused before anything was laid out


def test_batch_jobs_retire_before_their_wall_time_and_get_the_build_cache() -> None:
    table = cluster_table({"kind": "slurm", "walltime_min": 90.0, "retire_min": 6.0, "cores": 2, "memory_gb": 3.5,
                           "queue": "olfactory", "account": "lab", "directives": "--qos=short; --constraint=avx2",
                           "scratch": "/local/odour scratch"})
    settings = batch_job_settings("slurm", table)
    assert settings["walltime"] == "01:30:00"
    args = settings["worker_extra_args"]
    # retire between 90 - 1.5 * 6 = 81 and 90 - 0.5 * 6 = 87 minutes: lifetime 84 min, stagger 3 min
    assert args[args.index("--lifetime") + 1] == "5040s" and args[args.index("--lifetime-stagger") + 1] == "180s"
    assert settings["job_extra_directives"] == ["--qos=short", "--constraint=avx2"]
    assert settings["death_timeout"] == WORKER_DEATH_TIMEOUT_S  # whatever the user's Dask configuration says
    assert "export CAPSWEEP_BUILD_DIR='/local/odour scratch/builds'" in settings["job_script_prologue"]
    assert (settings["cores"], settings["processes"], settings["memory"]) == (2, 2, "3.5GB")
    assert (settings["queue"], settings["account"]) == ("olfactory", "lab")
    assert batch_job_settings("lsf", table)["walltime"] == "01:30"
    assert batch_job_settings("sge", table)["project"] == "lab"


@pytest.mark.parametrize(("changes", "named"), [
    ({"kind": "slurm", "walltime_min": 10.0, "retire_min": 7.0}, "execution.cluster.retire_min"),
    ({"kind": "htcondor", "queue": "short"}, "execution.cluster.queue"),
])
def test_batch_settings_a_system_cannot_honour_are_config_errors(changes: dict[str, Any], named: str) -> None:
    with pytest.raises(ConfigError, match=named.replace(".", r"\.")):
        batch_job_settings(changes["kind"], cluster_table(changes))


def test_a_scheduler_kind_needs_an_address_and_a_batch_kind_refuses_one() -> None:
    with pytest.raises(ConfigError, match="needs the scheduler's address"), dask_client(1, "", cluster={
            "kind": "scheduler"}):
        pass
    with pytest.raises(ConfigError, match="starts its own scheduler"), dask_client(1, "tcp://odour:8786", cluster={
            "kind": "slurm"}):
        pass


# --- worker faults ----------------------------------------------------------------------------------------------

def crash_on_seed_13(config: dict[str, Any], seed: int, wiring_seed: int) -> dict[str, Any]:
    """A task that kills its worker process for seed 13 (after noting the try in a file)."""
    if seed == 13:
        with open(config["tries_file"], "a") as tries:
            tries.write(f"{os.getpid()}\n")
        os._exit(1)
    return {"seed": seed}


def test_a_point_that_kills_its_worker_every_time_fails_after_max_tries_while_others_finish(tmp_path: Path) -> None:
    tries = tmp_path / "tries"
    jobs = [("bad", ({"tries_file": str(tries)}, 13, 0)), ("good", ({}, 1, 0))]
    # two workers: a task queued behind the bad one on a single worker dies with it (the scheduler counts every task
    # a lost worker held), which is the bad point's doing, not the good one's
    with dask_client(2, cluster={"max_tries": 2}) as client:
        results = dict(run_tasks(client, crash_on_seed_13, jobs))
    assert results["good"] == {"seed": 1}
    assert isinstance(results["bad"], TaskFailure) and "on each of its 2 tries" in results["bad"].error
    assert len(tries.read_text().split()) == 2  # two workers died, then the scheduler gave the point up


def test_a_parcel_whose_workers_die_is_split_so_only_the_crashing_point_fails(tmp_path: Path) -> None:
    tries = tmp_path / "tries"
    config = {"tries_file": str(tries)}
    jobs = [(seed, (config, seed, 0)) for seed in (1, 2, 13, 4, 5, 6)]
    # window 1: the first job runs alone and is measured (instant), so the other five go in one parcel
    with dask_client(2, cluster={"max_tries": 2}) as client:
        results = dict(run_tasks(client, crash_on_seed_13, jobs, window=1, group=lambda seed: "odour"))
    assert {seed: results[seed] for seed in (1, 2, 4, 5, 6)} == {seed: {"seed": seed} for seed in (1, 2, 4, 5, 6)}
    assert isinstance(results[13], TaskFailure) and "on each of its 2 tries" in results[13].error
    assert len(tries.read_text().split()) == 4  # the parcel's 2 tries, then the point's own 2


def test_a_worker_killed_mid_point_has_its_point_rerun_and_stored_once(tmp_path: Path, build_root: Path) -> None:
    from distributed import default_client

    sweep = tmp_path / "sweep.toml"
    sweep.write_text(KILL_SWEEP.format(store=tmp_path / "odour.zarr"))
    killed: list[tuple[int, int]] = []  # (pid, points finished when it was killed)
    progress_seen: list[Any] = []

    def kill_a_busy_worker() -> None:
        client = default_client()
        deadline = time.monotonic() + 300
        while time.monotonic() < deadline and not killed:
            busy = [address for address, keys in client.processing().items() if keys]
            if busy:
                time.sleep(1.0)  # into the simulation (a point runs for many seconds here)
                pid = client.run(os.getpid, workers=busy[:1])[busy[0]]
                killed.append((pid, progress_seen[-1].finished))
                os.kill(pid, signal.SIGKILL)
            time.sleep(0.2)

    def on_event(progress: Any) -> None:  # first called once the client has started
        progress_seen.append(progress)
        if len(progress_seen) == 1:
            threading.Thread(target=kill_a_busy_worker, daemon=True).start()

    final = run_sweep(sweep, RunOptions(), on_event=on_event)
    assert killed and killed[0][1] == 0, "no worker was killed while its point ran"
    assert (final.finished, final.failed, final.to_run) == (2, 0, 2)  # each point stored once, none lost
    assert _done_points(tmp_path / "odour.zarr") == 2


def _done_code() -> int:
    from capsweep.flags import STATUSES

    return STATUSES.index("done")


# --- a real batch system ----------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def slurm() -> None:
    sys.path.insert(0, str(Path(__file__).parent))
    from slurm import start_slurm

    reason = start_slurm()
    if reason:
        pytest.skip(f"no one-node SLURM: {reason}")


def _capsweep(sweep: Path, *args: str, cwd: Path | None = None) -> subprocess.Popen[str]:
    """``capsweep run SWEEP ARGS`` in a process of its own (its batch jobs are submitted from ``cwd``)."""
    return subprocess.Popen([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep), *args],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, cwd=cwd)


def _longer_slurm_sweep(tmp_path: Path, replicates: int) -> tuple[Path, int]:
    """The shipped SLURM file with more replicates, so a busy worker can be cancelled on a fast machine too."""
    text = SLURM_SWEEP.read_text()
    assert "replicates = 2\n" in text
    sweep = tmp_path / "cluster-slurm.toml"
    sweep.write_text(text.replace("replicates = 2\n", f"replicates = {replicates}\n"))
    return sweep, 2 * replicates  # two assembly counts


def _running_jobs() -> list[str]:
    shown = subprocess.run(["squeue", "-h", "-t", "R", "-o", "%i"], capture_output=True, text=True, timeout=30)
    return shown.stdout.split()


def _done_points(store: Path) -> int:
    if not (store / "zarr.json").exists():
        return 0
    with xr.open_zarr(store) as opened:
        return int((opened["status"].values == _done_code()).sum())


def _local_run(sweep: Path, store: Path) -> None:
    """Run ``sweep`` into ``store`` on this machine (two worker processes): the uninterrupted run to compare with."""
    local = _capsweep(sweep, "--store", str(store), "--cluster", "local", "--workers", "2")
    assert local.wait(timeout=900) == 0, local.communicate()[0]


def _assert_same_results(local_store: Path, batch_store: Path) -> None:
    """Every point of ``batch_store`` is done and every stored variable but the wall-clock times equals the local
    run's bitwise (a point's results depend only on its config and seeds, not on where or when it ran)."""
    with xr.open_zarr(local_store) as a, xr.open_zarr(batch_store) as b:
        assert (b["status"].values == _done_code()).all()
        assert sorted(a.data_vars) == sorted(b.data_vars)
        for name in sorted(set(a.data_vars) - set(TIMINGS)):
            left, right = a[name].values, b[name].values
            same = np.array_equal(left, right, equal_nan=left.dtype.kind == "f")
            assert same, f"{name} differs between the local and the SLURM run"


@pytest.mark.cluster
@pytest.mark.slow  # 96-186 s; the prescreen's SLURM test keeps a real SLURM run in CI
def test_slurm_sweep_survives_a_cancelled_worker_job_and_matches_a_local_run(
        slurm: None, tmp_path: Path, build_root: Path) -> None:
    local_store, batch_store = tmp_path / "local.zarr", tmp_path / "slurm.zarr"
    sweep, points = _longer_slurm_sweep(tmp_path, replicates=6)
    _local_run(sweep, local_store)

    batch = _capsweep(sweep, "--store", str(batch_store))
    cancelled = ""
    deadline = time.monotonic() + 900
    while batch.poll() is None and time.monotonic() < deadline:
        running = _running_jobs()
        if not cancelled and len(running) == 2 and 1 <= _done_points(batch_store) <= points - 3:
            cancelled = running[0]  # both workers have work: at least 3 points remain for 2 workers
            subprocess.run(["scancel", cancelled], check=True, timeout=30)
        time.sleep(0.25)
    output = batch.communicate(timeout=60)[0]
    assert batch.returncode == 0, output
    assert cancelled, f"the sweep ended before a worker job could be cancelled mid-sweep: {output}"
    assert _running_jobs() == [], "worker jobs outlived the sweep"
    _assert_same_results(local_store, batch_store)


def _slurm_jobs(submitted_from: Path) -> dict[str, str]:
    """The SLURM jobs there are now that were submitted from ``submitted_from``: id -> state (R, PD, CG, ...)."""
    shown = subprocess.run(["squeue", "-h", "-o", "%i %t %Z"], capture_output=True, text=True, timeout=30)
    return {job: state for job, state, where in (line.split(" ", 2) for line in shown.stdout.splitlines())
            if Path(where) == submitted_from}


@pytest.mark.cluster
def test_prescreen_of_a_slurm_sweep_runs_in_slurm_jobs_and_predicts_as_locally(slurm: None, tmp_path: Path) -> None:
    """`capsweep prescreen` takes the sweep's [execution.cluster] as `capsweep run` does: kind slurm submits worker
    jobs (seen in squeue while it runs, gone after), and the predictions equal a local prescreen's (they are
    deterministic, so any difference is a difference of the code that ran)."""
    command = [sys.executable, "-m", "capsweep.sweeps.cli", "prescreen", str(SLURM_SWEEP), "--format", "csv"]
    local = subprocess.run([*command, "--cluster", "local", "--workers", "1"], capture_output=True, text=True,
                           timeout=600, cwd=tmp_path)
    assert local.returncode == 0, local.stderr
    batch = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    seen: set[str] = set()
    deadline = time.monotonic() + 600
    while batch.poll() is None and time.monotonic() < deadline:
        seen |= set(_slurm_jobs(tmp_path))
        time.sleep(0.25)
    output, errors = batch.communicate(timeout=60)
    assert batch.returncode == 0, errors
    assert seen, "the prescreen of a kind = 'slurm' sweep submitted no SLURM job"
    assert not _slurm_jobs(tmp_path), "worker jobs outlived the prescreen"
    assert output == local.stdout
    assert len(output.strip().splitlines()) == 1 + 2  # a header and the sweep's two grid points


JOB_START_ALLOWANCE_S = 30.0
"""Time (s) allowed a queued worker job to start and run Python up to its worker's first connection attempt: a
margin (common practice), not a measurement; a queued job here ended 33.6-34.4 s after the kill, 3.6-4.4 s beyond
Dask's 30 s connect timeout (5 December 2026)."""


def _jobs_after(submitted_from: Path, deadline: float) -> dict[str, str]:
    """The jobs submitted from ``submitted_from`` still in the queue (any state, ending ones too) at monotonic time
    ``deadline`` or, if sooner, none."""
    while (jobs := _slurm_jobs(submitted_from)) and time.monotonic() < deadline:
        time.sleep(0.25)
    return jobs


@pytest.mark.cluster
@pytest.mark.slow
def test_a_killed_slurm_client_leaves_no_jobs_and_a_rerun_completes_the_store_as_a_local_run(
        slurm: None, tmp_path: Path, build_root: Path) -> None:
    """kill -9 of ``capsweep run`` while two worker jobs run points and a third waits in the queue (three jobs on the
    node's two cores): the running workers lose their scheduler and stop, the queued job starts, finds no scheduler
    and ends within the death timeout, so no job of the run is left; the same command then resumes the store and its
    results equal an uninterrupted local run's."""
    local_store, batch_store = tmp_path / "local.zarr", tmp_path / "slurm.zarr"
    sweep, points = _longer_slurm_sweep(tmp_path, replicates=3)
    _local_run(sweep, local_store)

    command = (sweep, "--store", str(batch_store), "--cluster-set", "max_jobs=3")
    batch = _capsweep(*command, cwd=tmp_path)
    deadline = time.monotonic() + 900
    while batch.poll() is None and time.monotonic() < deadline:
        states = sorted(_slurm_jobs(tmp_path).values())
        if states == ["PD", "R", "R"] and 1 <= _done_points(batch_store) <= points - 3:
            batch.kill()  # SIGKILL: no cleanup of any kind in the client
            break
        time.sleep(0.25)
    output = batch.communicate(timeout=60)[0]
    assert batch.returncode == -signal.SIGKILL, f"the sweep ended before its client could be killed: {output}"
    killed = time.monotonic()

    bound = WORKER_DEATH_TIMEOUT_S + JOB_START_ALLOWANCE_S
    left = _jobs_after(tmp_path, killed + bound)
    assert not left, f"jobs of the killed run outlived {bound:g} s: {left}"
    stored = _done_points(batch_store)
    assert 1 <= stored < points

    rerun = _capsweep(*command, cwd=tmp_path)
    output = rerun.communicate(timeout=900)[0]
    assert rerun.returncode == 0, output
    assert f"{points} points: {stored} stored before, {points - stored} to run" in output
    assert not _jobs_after(tmp_path, time.monotonic() + JOB_START_ALLOWANCE_S), "worker jobs outlived the rerun"
    _assert_same_results(local_store, batch_store)


def test_a_busy_dashboard_port_gives_no_warning_when_the_dashboard_is_off() -> None:
    """With another Dask cluster on the machine holding port 8787 (Dask's default for the scheduler's HTTP
    endpoint), every run printed a 4-line warning about it although the dashboard is off by default."""
    holder = socket.socket()
    try:
        holder.bind(("127.0.0.1", 8787))
    except OSError:
        pytest.skip("port 8787 is already held by another program: the situation of the finding itself")
    holder.listen()
    code = ("from capsweep.sweeps.dispatch import dask_client\n"
            "with dask_client(1) as client:\n    print(len(client.scheduler_info()['workers']))")
    try:
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=180)
    finally:
        holder.close()
    assert proc.returncode == 0 and proc.stdout.split() == ["1"], proc.stderr
    assert "8787" not in proc.stderr and "Port" not in proc.stderr, proc.stderr
