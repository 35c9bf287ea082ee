"""End to end through the real CLI: sweep file -> Dask LocalCluster -> Brian2 -> Zarr -> query.

Nothing is mocked: real worker processes run real Brian2 simulations of tiny networks and the
single writer fills a real Zarr store, which is then read with plain ``xarray.open_zarr``.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import zarr
from cli_runs import capsweep, tiny_network

from capsweep.results_schema.dataset import flag_labels
from capsweep.sweeps.capacity import point_success
from capsweep.sweeps.control_table import control_success

pytestmark = pytest.mark.e2e

RULES_SWEEP = """
[sweep]
name = "odour-e2e"
store = "{store}"
replicates = 1
base_seed = 7
[[sweep.axis]]
name = "rule"
[sweep.axis.variants]
full = {{}}
triplet_only = {{ "plasticity.heterosynaptic.enabled" = false, "plasticity.transmitter.enabled" = false, "plasticity.inhibitory.enabled" = false }}
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = [1, 3]
"""

RESUME_SWEEP = """
[sweep]
name = "odour-resume"
store = "{store}"
replicates = 2
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = [1, 2, 3, 4]
[execution]
workers = 1
"""


SHAM_SWEEP = """
[sweep]
name = "odour-sham"
store = "{store}"
replicates = 1
base_seed = 3
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1]
[controls]
kinds = ["sham"]
"""


THREADS_SWEEP = """
[sweep]
name = "odour-threads"
store = "{store}"
replicates = 2
[[sweep.axis]]
name = "n_assemblies"
key = "assemblies.count"
values = [1]
[execution]
workers = 1
threads = 2
"""


def write_sweep(tmp_path: Path, template: str, hold_s: float, adapt_jump: float = 0.0) -> tuple[Path, Path]:
    store = tmp_path / "odour.zarr"
    sweep = tmp_path / "sweep.toml"
    sweep.write_text(template.format(store=store) + tiny_network(hold_s, adapt_jump=adapt_jump))
    return sweep, store


@pytest.fixture(scope="module")
def rules_store(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, subprocess.CompletedProcess[str]]:
    sweep, store = write_sweep(tmp_path_factory.mktemp("rules"), RULES_SWEEP, hold_s=7.0)
    return sweep, store, capsweep("run", str(sweep), "--workers", "2", "--prescreen")


def test_store_holds_labelled_results(rules_store) -> None:
    _, store, proc = rules_store
    assert proc.returncode == 0, proc.stderr
    ds = xr.open_zarr(store)
    assert ds["status"].dims == ("rule", "n_assemblies", "replicate")
    assert list(ds["rule"].values) == ["full", "triplet_only"]
    assert list(ds["n_assemblies"].values) == [1, 3]
    assert ds["recall_quality"].dims[-1] == "assembly" and ds.sizes["assembly"] == 3
    assert (ds["status"].values == 1).all(), "every point done"
    for name in ("recall_quality", "runaway_onset_s", "rate_exc_hz", "weight_correlation"):
        assert ds[name].attrs["units"] and ds[name].attrs["long_name"]
    assert ds["outcome"].attrs["flag_meanings"].split() == ["stable", "runaway", "silent"]
    assert ds.attrs["sweep_name"] == "odour-e2e"
    # one assembly scored for count 1, the second entry padded
    assert np.isnan(ds["recall_quality"].sel(rule="full", n_assemblies=1).values[0, 1])


def test_a_run_into_a_pipe_logs_plain_progress_lines_and_a_closing_line(rules_store) -> None:
    """Output to a file or pipe used to show nothing between the start line and one garbled last line; the
    closing line said 'workers 0' and named neither the store nor the next command."""
    _, store, proc = rules_store
    lines = proc.stderr.splitlines()
    progress = [line for line in lines if re.fullmatch(r"\[[^]]+\] \d+/4 points, \d+ failed, ETA .*", line)]
    assert len(progress) >= 2 and progress[-1].split("] ", 1)[1].startswith("4/4 points, 0 failed")
    assert "\r" not in proc.stderr and "\x1b" not in proc.stderr, "no terminal control codes in a log"
    assert " on 2 workers " in lines[-2]
    assert lines[-1] == f"store: {store}; next: capsweep capacity {store}"


def test_triplet_alone_runs_away_and_full_rule_recalls(rules_store) -> None:
    """Hebbian STDP alone is unstable with stored assemblies; the heterosynaptic and
    transmitter-induced terms plus inhibitory STDP keep them stable and recallable
    (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922) [common practice in the field]."""
    _, store, _ = rules_store
    ds = xr.open_zarr(store).load()
    outcome = ds["outcome"].values
    runaway, stable = 1, 0
    assert (outcome[1] == runaway).all(), "triplet_only points run away"
    assert np.isfinite(ds["runaway_onset_s"].values[1]).all()
    assert (outcome[0] == stable).all(), "full-rule points stay stable"
    full = ds.sel(rule="full")
    for count in (1, 3):
        quality = full["recall_quality"].sel(n_assemblies=count).values[0, :count]
        assert (quality >= 0.5).all(), quality
    # three odours: each cue evokes completion beyond both nulls
    assert int(full["recalled_count"].sel(n_assemblies=3).values[0]) == 3
    # one odour in this network without adaptation: the lone assembly turns itself on during the hold and is on
    # before its cue, which the overlap score still counts as recalled and the recall test does not
    one = full.sel(n_assemblies=1).isel(replicate=0, assembly=0)
    assert flag_labels(one["recall_state"]).item() == "already_active"
    assert int(one["overlap_recalled_count"]) == 1 and int(one["recalled_count"]) == 0
    assert int(one["stuck_count"]) == 1 and float(one["stuck_onset_s"]) < 8.0  # before the final test (hold end 8 s)
    # aborted runaway points simulated less than the full-rule points
    assert (ds["simulated_time_s"].values[1] < ds["simulated_time_s"].values[0]).all()


@pytest.mark.reference
def test_prescreen_prediction_is_stored_beside_each_point(rules_store) -> None:
    """`run --prescreen` stores the prescreen's verdict beside every simulated outcome.

    Where theory and simulation agree by construction of the rule: triplet STDP alone (no
    heterosynaptic term, no inhibitory plasticity) has no bound on potentiation above its BCM-like
    threshold and runs away (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922), predicted and
    simulated; the full rule with one assembly stays stable. Agreement over whole regions is
    measured by benchmarks/prescreen_agreement.py (README, "Prescreen").
    """
    _, store, _ = rules_store
    ds = xr.open_zarr(store)
    predicted = ds["predicted_outcome"].values
    assert np.isfinite(predicted).all()
    outcome = {name: i for i, name in enumerate(ds["outcome"].attrs["flag_meanings"].split())}
    triplet = ds.sel(rule="triplet_only")
    assert (triplet["predicted_outcome"].values == outcome["runaway"]).all()
    assert (triplet["outcome"].values == outcome["runaway"]).all()
    one = ds.sel(rule="full", n_assemblies=1)
    assert int(one["predicted_outcome"].values.ravel()[0]) == int(one["outcome"].values.ravel()[0]) == outcome["stable"]


@pytest.mark.slow  # 68 s in a suite run; test_prescreen_regions checks the prescreen in CI
def test_prescreen_against_its_store_counts_what_the_store_holds(rules_store, tmp_path: Path) -> None:
    """`prescreen SWEEP --against STORE`: the agreement it prints is the share of points whose stored simulated
    outcome equals the stored `run --prescreen` verdict (read here with plain xarray), and it writes its PNG."""
    sweep, store, _ = rules_store
    ds = xr.open_zarr(store)
    share = float((ds["outcome"].values == ds["predicted_outcome"].values).mean())
    shown = capsweep("prescreen", str(sweep), "--against", str(store), "--plots", str(tmp_path), "--workers", "1")
    assert shown.returncode == 0, shown.stderr
    assert f"outcome agreement: {share:.0%} of {ds['outcome'].size} done points" in shown.stdout
    assert "can reach here is 100%" in shown.stdout  # one replicate per grid point: any verdict can match it
    assert (tmp_path / "odour_prescreen_agreement.png").stat().st_size > 10_000


def test_query_status_and_rerun(rules_store) -> None:
    sweep, store, _ = rules_store
    query = capsweep("query", str(store), "--format", "json")
    assert query.returncode == 0, query.stderr
    rows = json.loads(query.stdout)["rows"]
    assert {r["rule"] for r in rows} == {"full"} and len(rows) == 2
    narrowed = json.loads(capsweep("query", str(store), "--where", "n_assemblies == 3", "--format", "json").stdout)["rows"]
    # --where narrows the default "done and stable" filter; --all drops the default
    assert [(r["rule"], r["n_assemblies"], r["outcome"], r["success"]) for r in narrowed] == [("full", 3, "stable", True)]
    every = json.loads(capsweep("query", str(store), "--all", "--where", "n_assemblies == 3", "--format", "json").stdout)
    assert sorted((r["rule"], r["status"], r["outcome"], r["success"]) for r in every["rows"]) == [
        ("full", "done", "stable", True), ("triplet_only", "done", "runaway", False)]
    bad = capsweep("query", str(store), "--where", "nonsense >")
    assert bad.returncode != 0 and "--where" in bad.stderr and "Traceback" not in bad.stderr
    status = capsweep("status", str(store))
    assert "done 4" in status.stdout and "runaway 2" in status.stdout and "stable 2" in status.stdout
    before = xr.open_zarr(store)["wall_time_s"].values.copy()
    again = capsweep("run", str(sweep))
    assert again.returncode == 0 and "0 to run" in again.stderr
    assert again.stderr.splitlines()[-1] == f"store: {store}; next: capsweep capacity {store}"
    np.testing.assert_array_equal(xr.open_zarr(store)["wall_time_s"].values, before)


def test_other_sweep_on_same_store_is_refused(rules_store, tmp_path: Path) -> None:
    sweep, store, _ = rules_store
    other = tmp_path / "other.toml"
    other.write_text(sweep.read_text().replace("values = [1, 3]", "values = [1, 2]"))
    before = sorted(p.name for p in store.rglob("*"))
    proc = capsweep("run", str(other))
    assert proc.returncode == 3
    assert str(store) in proc.stderr and "Traceback" not in proc.stderr
    assert sorted(p.name for p in store.rglob("*")) == before, "a refused run must not touch the store"


def _done(store: Path) -> np.ndarray:
    """Done mask of a store that may still be being laid out (then: nothing done)."""
    try:
        return zarr.open_group(store, mode="r")["status"][...] == 1
    except (KeyError, FileNotFoundError):
        return np.zeros(1, dtype=bool)


def run_until_stored(sweep: Path, store: Path, points: int) -> subprocess.Popen[str]:
    """Start `capsweep run SWEEP` in a session of its own and return once ``points`` points are done."""
    run = subprocess.Popen([sys.executable, "-m", "capsweep.sweeps.cli", "run", str(sweep)], start_new_session=True,
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline and not (store.exists() and _done(store).sum() >= points):
        time.sleep(0.2)
    assert store.exists() and _done(store).sum() >= points, "the run stored nothing in time"
    return run


def test_killed_sweep_resumes_without_recomputing(tmp_path: Path) -> None:
    # Long enough holds that the 7 points after the first outlast the start of the second run (about 5 s) on an idle
    # machine: at 8 s holds the first run finished all 8 points before the second run asked for the lock.
    sweep, store = write_sweep(tmp_path, RESUME_SWEEP, hold_s=24.0)
    first = run_until_stored(sweep, store, 1)
    second = capsweep("run", str(sweep))  # concurrent run on a locked store
    assert second.returncode == 3 and "locked" in second.stderr, second.stderr
    os.killpg(first.pid, signal.SIGKILL)
    first.wait()
    done_before = _done(store)
    assert not done_before.all(), "killed too late to test resume"
    kept = xr.open_zarr(store)["wall_time_s"].values.copy()

    resumed = capsweep("run", str(sweep), "--dashboard")
    assert resumed.returncode == 0, resumed.stderr
    assert f"{int(done_before.sum())} stored before" in resumed.stderr
    assert "Dask dashboard: http://" in resumed.stderr, "--dashboard serves and shows the dashboard"
    assert "Dask dashboard" not in first.stderr.read(), "no dashboard unless asked for"
    ds = xr.open_zarr(store)
    assert (ds["status"].values == 1).all()
    np.testing.assert_array_equal(ds["wall_time_s"].values[done_before], kept[done_before])


@pytest.mark.slow  # 213 s in a suite run (a two-thread build of its own); test_engines runs threads in CI
def test_one_worker_with_two_threads_per_point(tmp_path: Path, build_root: Path) -> None:
    """execution.threads = 2 on one local worker: every point runs on the standalone binary's two OpenMP threads."""
    sweep, store = write_sweep(tmp_path, THREADS_SWEEP, hold_s=1.0)
    run = capsweep("run", str(sweep))
    assert run.returncode == 0, run.stderr
    ds = xr.open_zarr(store)
    assert (ds["status"].values == 1).all()
    assert (ds["threads"].values == 2).all()
    assert (ds["engine"].values == ds["engine"].attrs["flag_meanings"].split().index("standalone")).all()
    assert np.isfinite(ds["rate_exc_baseline_hz"].values).all()


def test_unreachable_scheduler_is_named_and_the_new_store_kept(tmp_path: Path) -> None:
    """The workers of a new store start in the background; their failure still gets one clear line."""
    sweep, store = write_sweep(tmp_path, RESUME_SWEEP, hold_s=1.0)
    proc = capsweep("run", str(sweep), "--scheduler", "tcp://127.0.0.1:9")
    assert proc.returncode == 2, proc.stderr
    assert "tcp://127.0.0.1:9" in proc.stderr and "Traceback" not in proc.stderr
    assert (xr.open_zarr(store)["status"].values == 0).all(), "the laid-out store holds every point as pending"


def test_a_sham_cue_is_not_a_success_while_the_same_point_with_its_cue_is(tmp_path: Path) -> None:
    """The control of the recall test on a real simulation: the demo's network (the tiny network with adaptation)
    with one prewired odour and its sham control ([controls] kinds = ["sham"]: the cue input off, everything else
    equal). Only the cued point recalls its odour and succeeds; without a cue nothing is evoked (the recall test's
    null of times sees the members' spontaneous activity), so the sham point is not a success, whatever the overlap
    score says. `capsweep capacity` shows the sham's 0 of 1 beside the condition's capacity and flags nothing."""
    sweep, store = write_sweep(tmp_path, SHAM_SWEEP, hold_s=7.0, adapt_jump=0.1)
    proc = capsweep("run", str(sweep), "--workers", "1")
    assert proc.returncode == 0, proc.stderr
    ds = xr.open_zarr(store).load()
    success = point_success(ds).sel(n_odours=1).isel(replicate=0)
    assert success.sel(control="none").item() == 1.0 and success.sel(control="sham").item() == 0.0
    state = flag_labels(ds["recall_state"]).sel(n_odours=1, assembly=0).isel(replicate=0)
    assert state.sel(control="none").item() == "recalled" and state.sel(control="sham").item() != "recalled"
    evoked = ds["evoked_completion_hz"].sel(n_odours=1, assembly=0).isel(replicate=0)
    assert float(evoked.sel(control="none")) > 5.0 > float(evoked.sel(control="sham"))
    sham = control_success(ds).set_index("control").loc["sham"]
    assert (sham["n"], sham["successes"], sham["alpha"], sham["flagged"]) == (1, 0, 0.01, False)
    report = capsweep("capacity", str(store))
    assert report.returncode == 0, report.stderr
    beside = report.stdout.split("controls beside each condition")[1]
    assert "lower bound" in beside and "0/1 (0-79 %)" in beside, "capacity 1 of 1 beside the sham's 0 of 1"
    assert "warning" not in report.stdout


@pytest.mark.parametrize("stop", [signal.SIGINT, signal.SIGTERM])
def test_ctrl_c_mid_run_stops_quietly_and_keeps_what_was_stored(tmp_path: Path, stop: signal.Signals) -> None:
    """Ctrl-C printed about 30 lines of Dask worker tracebacks. A terminal's Ctrl-C sends SIGINT to the whole
    foreground process group [POSIX, General Terminal Interface, 11.1.9]: here, to the run's new session. SIGTERM,
    what `kill` and a batch system's cancel send, stops it the same way; it used to end the run at once, and a run
    started in the background of a script (SIGINT ignored there, POSIX) could be stopped by nothing milder."""
    sweep, store = write_sweep(tmp_path, RESUME_SWEEP, hold_s=8.0)
    run = run_until_stored(sweep, store, 1)
    os.killpg(run.pid, stop)
    _, stderr = run.communicate(timeout=120)
    assert run.returncode == 130, stderr
    assert "Traceback" not in stderr and "KeyboardInterrupt" not in stderr, stderr
    assert stderr.splitlines()[-1].startswith("capsweep: interrupted; results stored so far are kept")
    assert not _done(store).all() and _done(store).sum() >= 1


@pytest.mark.reference
def test_replay_reproduces_the_stored_point_and_its_nwb_spikes_give_the_stored_rates(rules_store,
                                                                                      tmp_path: Path) -> None:
    """`capsweep replay` reruns one point in this process; its metrics equal the stored ones bit for bit, and the
    spikes of its NWB file, read back with pynwb (the format's reference library), binned by whole simulation
    steps, give the E and I population rates the original run stored (rate per cell = spikes / (cells x bin))
    [derived]. Control: a result one ulp off in one variable, or with another outcome, is caught."""
    from pynwb import NWBHDF5IO

    from capsweep.sweeps.replay import INHIBITORY_UNIT, differing_variables, replay, write_outputs

    _, store, _ = rules_store
    ds = xr.open_zarr(store)
    point_id = str(ds["point_id"].sel(rule="full", n_assemblies=3).values[0])
    run = replay(store, point_id)
    assert run.differing == []
    off = dict(run.result, rate_exc_baseline_hz=np.nextafter(run.result["rate_exc_baseline_hz"], np.inf),
               outcome="runaway")
    assert differing_variables(store, run.point, off) == ["outcome", "rate_exc_baseline_hz"]

    written = write_outputs(run, tmp_path / "new" / "dir")
    assert sorted(p.suffix for p in written) == [".nwb", ".png", ".png", ".png"]
    assert all(p.stat().st_size > 10_000 for p in written if p.suffix == ".png")
    stored = ds.sel(rule="full", n_assemblies=3, replicate=0)
    cfg = run.point.config
    dt_s, bin_s = cfg["network"]["dt_ms"] * 1e-3, cfg["detection"]["trace_bin_ms"] * 1e-3
    steps_per_bin = round(bin_s / dt_s)
    n_bins = int(float(stored["simulated_time_s"]) / bin_s + 1e-9)  # whole bins (a last partial one is left out)
    with NWBHDF5IO(str(next(p for p in written if p.suffix == ".nwb")), mode="r") as io:
        units = io.read().units.to_dataframe()
    excitatory = units[units["population"] == "E"]
    assert len(excitatory) == cfg["network"]["n_exc"]
    members = excitatory["assemblies"].str.split(",").map(lambda ks: [k for k in ks if k])
    assert sorted(len([m for m in members if str(k) in m]) for k in range(3)) == [cfg["assemblies"]["size"]] * 3
    for spikes, cells, name in ((np.concatenate(excitatory["spike_times"].to_list()), len(excitatory), "rate_exc_hz"),
                                (units[units["population"] == INHIBITORY_UNIT]["spike_times"].iloc[0],
                                 len(run.handles.inh), "rate_inh_hz")):
        step = np.rint(np.asarray(spikes) / dt_s).astype(int)
        counts = np.bincount(step // steps_per_bin, minlength=n_bins)[:n_bins]
        np.testing.assert_allclose(counts / (cells * bin_s), stored[name].values[:n_bins], rtol=1e-12)
