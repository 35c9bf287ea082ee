"""The ``capsweep`` command line: a thin typer layer, one library function per command.

User errors (bad sweep file, foreign or locked store, bad filter) print one line on stderr and
exit non-zero without a traceback.
"""

from __future__ import annotations

import functools
import os
import sys
import tomllib
import warnings
from collections.abc import Callable
from enum import StrEnum
from pathlib import Path
from typing import Any

import typer
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    ProgressColumn,
    Task,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)
from rich.text import Text

from .. import __version__
from ..clusters import NAMES as CLUSTER_KINDS
from ..engines import ENGINES, NAMES
from ..errors import CapsweepError, StoreError, file_system_fault
from ..flags import DONE, FAILED, PENDING, UNNEEDED
from ..registry import ImplausibleValue
from ..results_schema import attrs
from .success import MIN_FRACTION

app = typer.Typer(
    add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
    help="Sweep plastic spiking-network memory models: Brian2 points on Dask, one Zarr store, capacity answers.",
)
err = Console(stderr=True)
out = Console()


class TableFormat(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"


def _show_version(value: bool) -> None:
    if value:
        typer.echo(__version__)
        raise typer.Exit()


def _show_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                  file: Any = None, line: str | None = None) -> None:
    """A warning about the user's input as one 'capsweep: warning:' line on stderr; others as Python shows them."""
    if issubclass(category, ImplausibleValue):
        typer.echo(f"capsweep: warning: {message}", err=True)
    else:
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


@app.callback()
def _every_command(
    version: bool = typer.Option(False, "--version", callback=_show_version, is_eager=True,
                                 help="print the capsweep version and exit"),
) -> None:
    """Show plausibility warnings about sweep files as one line each (they never stop a command)."""
    warnings.simplefilter("always", ImplausibleValue)
    warnings.showwarning = _show_warning


def user_errors(command: Callable[..., Any]) -> Callable[..., Any]:
    """Turn CapsweepError and file-system faults into one line on stderr and an exit code; Ctrl-C into exit 130."""

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return command(*args, **kwargs)
        except CapsweepError as exc:
            typer.echo(f"capsweep: error: {exc}", err=True)
            raise typer.Exit(exc.exit_code) from None
        except OSError as exc:
            line = file_system_fault(exc)
            if line is None:
                raise
            typer.echo(f"capsweep: error: {line}", err=True)
            raise typer.Exit(StoreError.exit_code) from None
        except KeyboardInterrupt:
            typer.echo("capsweep: interrupted; results stored so far are kept. Rerun the same command to resume.",
                       err=True)
            raise typer.Exit(130) from None

    return wrapper


_CLUSTER_HELP = f"override execution.cluster.kind: {', '.join(CLUSTER_KINDS)}"
_CLUSTER_SET_HELP = "override execution.cluster.NAME (repeatable), e.g. max_jobs=8"


@app.command()
@user_errors
def run(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    store: Path = typer.Option(None, "--store", help="Zarr store directory (default: \\[sweep].store)"),
    workers: int = typer.Option(None, "--workers", min=1, help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", help="address of a running Dask scheduler"),
    dashboard: bool = typer.Option(None, "--dashboard/--no-dashboard",
                                   help="serve the local cluster's Dask dashboard (default: execution.dashboard)"),
    engine: str = typer.Option(None, "--engine", help=f"override execution.engine: {', '.join(NAMES)}"),
    retry_failed: bool = typer.Option(False, "--retry-failed", help="run failed points again"),
    prescreen: bool = typer.Option(None, "--prescreen/--no-prescreen",
                                   help="store the prescreen's predicted outcome beside each point "
                                        "(default: execution.prescreen)"),
    cluster: str = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
    cluster_set: list[str] = typer.Option(None, "--cluster-set", metavar="NAME=VALUE", help=_CLUSTER_SET_HELP),
) -> None:
    """Run every point of SWEEP_FILE not yet done, writing each result into the store as it arrives."""
    from .launch import RunOptions, run_sweep

    _check_engine(engine)
    options = RunOptions(store=store, workers=workers, scheduler=scheduler, dashboard=dashboard, engine=engine,
                         prescreen=prescreen, retry_failed=retry_failed,
                         cluster=_cluster_entries(cluster, cluster_set or []))
    with _ProgressView() as view:
        final = run_sweep(sweep_file, options, on_event=view.update)
    _print_run_summary(final)
    if final.failed:
        raise typer.Exit(1)


def _cluster_entries(kind: str | None, pairs: list[str]) -> dict[str, Any]:
    """``--cluster`` and ``--cluster-set NAME=VALUE`` as [execution.cluster] entries; VALUE is read as TOML
    (``8``, ``1.5``, ``true``), else kept as text. The registry checks names and values later."""
    entries: dict[str, Any] = {} if kind is None else {"kind": kind}
    for pair in pairs:
        name, sep, text = pair.partition("=")
        if not sep or not name.strip():
            raise CapsweepError(f"--cluster-set {pair!r} is not allowed: write NAME=VALUE, e.g. max_jobs=8")
        try:
            entries[name.strip()] = tomllib.loads(f"v = {text}")["v"]
        except tomllib.TOMLDecodeError:
            entries[name.strip()] = text
    return entries


class _WorkersColumn(ProgressColumn):
    """The number of Dask workers connected now, asked at each refresh (batch jobs start and end between points)."""

    def render(self, task: Task) -> Text:
        return Text(f"workers {task.fields['workers']()}")


class _ProgressView:
    """Renders launch.Progress events as a rich progress bar with failures, workers and ETA."""

    def __init__(self) -> None:
        self.bar = Progress(
            TextColumn("[bold]points"), BarColumn(), MofNCompleteColumn(),
            TextColumn("failed {task.fields[failed]}"), _WorkersColumn(), TimeElapsedColumn(), TextColumn("ETA"),
            TimeRemainingColumn(), TextColumn("[dim]{task.fields[last]}"), console=err, refresh_per_second=2,
        )
        self.task: Any = None
        self.dashboard_shown = False

    def __enter__(self) -> _ProgressView:
        return self

    def __exit__(self, *exc: object) -> None:
        if self.task is not None:
            self.bar.stop()

    def update(self, progress: Any) -> None:
        """Show ``progress`` (a launch.Progress)."""
        if self.task is None:
            err.print(f"{progress.total} points: {progress.already_done} stored before, {progress.to_run} to run")
            self.bar.start()
            self.task = self.bar.add_task("run", total=progress.to_run, failed=0, last="",
                                          workers=progress.worker_count)
        if progress.dashboard and not self.dashboard_shown:
            self.bar.console.print(f"Dask dashboard: {progress.dashboard}")
            self.dashboard_shown = True
        self.bar.update(self.task, completed=progress.finished, total=progress.to_run - progress.unneeded,
                        failed=progress.failed, last=progress.last, workers=progress.worker_count)


def _print_run_summary(progress: Any) -> None:
    outcomes = ", ".join(f"{k} {v}" for k, v in sorted(progress.outcomes.items())) or "none"
    engines = ", ".join(f"{k} {v}" for k, v in sorted(progress.engines.items())) or "none"
    err.print(
        f"ran {progress.finished} of {progress.to_run} points in {progress.elapsed_s:.1f} s "
        f"({progress.failed} failed; outcomes: {outcomes}; engines: {engines}); "
        f"{progress.already_done} were already stored"
        + (f"; {progress.unneeded} the count search did not need" if progress.unneeded else "")
    )
    asked = ENGINES.get(progress.engine)
    if asked is not None and asked.fallback and progress.engines.get(asked.fallback):
        err.print(f"note: some points ran on {asked.fallback} because the {asked.name} engine cannot express "
                  f"their settings ({asked.cannot})")


@app.command()
@user_errors
def status(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    failed: bool = typer.Option(False, "--failed", help="list each failed point: its labels, id and error line"),
) -> None:
    """Counts of points by every status and by outcome, and the base network's plausibility."""
    from .query import failed_points, open_store, plausibility, status_counts

    ds = open_store(store, "status")
    counts = status_counts(ds)
    out.print(f"store {store}: sweep {ds.attrs.get(attrs.SWEEP_NAME, '?')!r}, {int(ds['status'].size)} points",
              markup=False, highlight=False)
    out.print("status:  " + ", ".join(f"{k} {v}" for k, v in counts["status"].items()), highlight=False)
    out.print("outcome: " + ", ".join(f"{k} {v}" for k, v in counts["outcome"].items()) + "  (done points)",
              highlight=False)
    if failed:
        for point in failed_points(ds):
            labels = " ".join(f"{dim}={value}" for dim, value in point.labels.items())
            out.print(f"failed {labels} ({point.point_id}): {point.error}", markup=False, highlight=False,
                      soft_wrap=True)
    if counts["status"][DONE] == 0:
        out.print("no point done yet")
        return
    check = plausibility(ds)
    out.print(
        f"baseline E rate {check.rate_exc_hz[0]:.2f}-{check.rate_exc_hz[1]:.2f} Hz, "
        f"I rate {check.rate_inh_hz[0]:.2f}-{check.rate_inh_hz[1]:.2f} Hz, "
        f"ISI CV {check.isi_cv[0]:.2f}-{check.isi_cv[1]:.2f}"
    )
    for warning in check.warnings:
        out.print(f"warning: {warning}")


SUMMARY_COLUMNS = (
    "outcome", "recalled_count", "recall_score_min", "runaway_onset_s", "rate_exc_baseline_hz",
    "weight_correlation_end", "assembly_contrast_end", "wall_time_s",
)


@app.command()
@user_errors
def query(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    where: str = typer.Option(None, "--where", help='pandas filter, e.g. \'outcome == "stable" and beta > 0\''),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", help="table, csv or json"),
    everything: bool = typer.Option(False, "--all",
                                    help="drop the default filter (done, stable); --where still applies"),
) -> None:
    """List points with their outcome and metrics in sweep order (default: the done, stable ones).

    The table names its filter on stderr. Columns of csv and json: the sweep axes in sweep-file order,
    replicate, point_id, status, the scalar metrics, then per-point summaries. Integers have no decimals;
    missing values are empty (csv) or null (json). csv: a column with a physical unit (the store's CF units)
    is headed 'name [unit]' unless its name ends in the unit (wall_time_s). json: one object
    {"units": {column: unit}, "filter": expression, "rows": [{column: value}, ...]}.
    """
    from .query import active_filter, column_units, open_store, point_table, select, sweep_dims, table_csv, table_json

    ds = open_store(store, "query")
    expression, description = active_filter(where, everything)
    rows = select(point_table(ds), expression)
    if fmt is TableFormat.table:
        err.print(f"filter: {description}", markup=False, highlight=False, soft_wrap=True)
        _emit(rows[[*sweep_dims(ds), *SUMMARY_COLUMNS]], fmt)
        return
    units = column_units(ds, list(rows.columns))
    sys.stdout.write(table_csv(rows, units) if fmt is TableFormat.csv else table_json(rows, units, expression))


@app.command()
@user_errors
def capacity(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    min_fraction: float = typer.Option(MIN_FRACTION, "--min-fraction",
                                       help="fraction of replicates in which each count up to capacity must succeed"),
    per_count: bool = typer.Option(False, "--per-count", help="csv/json: the per-count success table instead"),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", help="table, csv or json"),
) -> None:
    """Capacity per condition (combination of the other axes): largest assembly count whose every smaller count
    succeeds.

    A point succeeds when it is done, stable and recalls every assembly. The table shows each
    count's success fraction with its 95 % Wilson interval, then the capacity with the range of
    the per-replicate capacities; 'at least' marks the top of the grid, NA a condition with pending points.
    """
    from .capacity import capacity_table, count_dim, scaling_fit, success_table
    from .query import open_store

    ds = open_store(store, "capacity")
    table = capacity_table(ds, min_fraction)
    if fmt is not TableFormat.table:
        _emit(success_table(ds) if per_count else table, fmt)
        return
    _say("success per count (n = done replicates; 95 % Wilson interval; crashed points left out):")
    _emit(success_table(ds), fmt)
    _say(f"\ncapacity (every count up to it succeeds in >= {min_fraction:g} of replicates; "
         "range over replicates):")
    _emit(_capacity_display(table), fmt)
    fit = scaling_fit(ds)
    if fit is not None:
        _say(f"capacity ~ {fit.prefactor:.3g} x n_exc^b, b = {fit.exponent:.2f} "
             f"[{fit.exponent_lo:.2f}, {fit.exponent_hi:.2f}] (95 % bootstrap over replicates; sizes "
             f"{', '.join(map(str, fit.sizes))}"
             + (f"; at the top of the grid, so underestimated: {fit.lower_bounds}" if fit.lower_bounds else "")
             + ")")
    others = [c for c in table.columns if c not in _CAPACITY_COLUMNS]
    for _, row in table[table["non_monotone"]].iterrows():
        where = ", ".join(f"{c}={row[c]}" for c in others) or "the grid"
        _say(f"warning: success is not monotone in {count_dim(ds)} for {where}: a larger count succeeds "
             "after a smaller one failed")


def _say(line: str) -> None:
    """One line of the capacity report, never wrapped at the terminal width (so it stays greppable)."""
    out.print(line, highlight=False, markup=False, soft_wrap=True)


_CAPACITY_COLUMNS = ("capacity", "capacity_lo", "capacity_hi", "at_least", "non_monotone", "replicates_used",
                     PENDING, FAILED, UNNEEDED)


def _capacity_display(table: Any) -> Any:
    """The capacity table as shown on screen: 'at least k' at the top of the grid, NA for undecided conditions."""
    import pandas as pd

    shown = table.drop(columns=["capacity_lo", "capacity_hi", "at_least"])
    shown["capacity"] = ["NA" if pd.isna(row.capacity) else f"at least {row.capacity}" if row.at_least
                         else str(row.capacity) for row in table.itertuples()]
    shown.insert(shown.columns.get_loc("capacity") + 1, "replicate_range",
                 ["NA" if pd.isna(row.capacity_lo) else f"{row.capacity_lo}-{row.capacity_hi}"
                  for row in table.itertuples()])
    return shown


@app.command()
@user_errors
def plot(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    out_dir: Path = typer.Option(Path("plots"), "--out", help="folder for the figures (created if missing)"),
    x: str = typer.Option(None, "--x", help="sweep dim across the stability map (default: the first axis)"),
    y: str = typer.Option(None, "--y", help="sweep dim up the stability map (default: the first other axis; "
                          "none: one row)"),
    capacity_axis: str = typer.Option(None, "--capacity-against",
                                      help="axis to draw capacity against (default: every axis but the count)"),
    formats: list[str] = typer.Option(None, "--format", help="png, svg or pdf; repeat or comma-separate "
                                      "(default: png)"),
    dpi: int = typer.Option(None, "--dpi", help="resolution of PNG files, dots per inch (default: 200)"),
) -> None:
    """Write figures: stability map, capacity curves and against each axis, recall per assembly, prediction
    against simulation, rate traces with the protocol shaded, weight drift."""
    from .plots import all_plots
    from .query import open_store

    written = all_plots(open_store(store, "plot"), out_dir, x, y, formats, dpi, capacity_axis)
    for path in written.paths:
        out.print(str(path), markup=False, highlight=False)
    for note in written.notes:
        typer.echo(f"note: {note}", err=True)


@app.command()
@user_errors
def export(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    netcdf: Path = typer.Option(None, "--netcdf", help="new netCDF-4 file: the whole store, CF conventions"),
    csv: Path = typer.Option(None, "--csv", help="new CSV file: every point, columns as `query --format csv`"),
) -> None:
    """Write the store for other tools; existing files are never overwritten.

    --netcdf writes every variable with its CF metadata (checked with the IOOS compliance checker's CF
    suite); text axes become an index with the values in '<axis>_value'. --csv writes the point table of
    every point, with units in the headers as `capsweep query --format csv` writes them.
    """
    from .export import write_csv, write_netcdf
    from .query import open_store

    if netcdf is None and csv is None:
        raise CapsweepError("capsweep export needs --netcdf FILE, --csv FILE or both")
    ds = open_store(store, "export")
    if netcdf is not None:
        write_netcdf(ds, store, netcdf)
        out.print(str(netcdf), markup=False, highlight=False)
    if csv is not None:
        write_csv(ds, csv)
        out.print(str(csv), markup=False, highlight=False)


@app.command("prescreen")
@user_errors
def prescreen_command(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    plots: Path = typer.Option(None, "--plots", help="folder for transfer-curve and drift-curve PNGs per grid point"),
    workers: int = typer.Option(None, "--workers", min=1, help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", help="address of a running Dask scheduler"),
    cluster: str = typer.Option(None, "--cluster", help=_CLUSTER_HELP),
    cluster_set: list[str] = typer.Option(None, "--cluster-set", metavar="NAME=VALUE", help=_CLUSTER_SET_HELP),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", help="table, csv or json"),
    against: Path = typer.Option(None, "--against",
                                 help="store this sweep ran into: print agreement with it and write a PNG "
                                      "(into --plots, else next to the store)"),
) -> None:
    r"""Predict each grid point's outcome without simulating: a surrogate fitted to simulations, built on
    mean-field quantities. Also each condition's stability bound (the largest count up to which every count is
    predicted stable; recall does not enter). Points outside the surrogate's calibration box are named in a
    warning. Runs on the sweep's \[execution.cluster] like `capsweep run`."""
    from .prescreen import (
        OUTSIDE_CALIBRATION,
        agreement_plot_path,
        check_against,
        compare,
        outcome_table,
        prescreen_sweep,
    )

    if against is not None:
        check_against(sweep_file, against)
    with Progress(TextColumn("[bold]grid points"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                  console=err) as bar:
        task = bar.add_task("prescreen", total=None)
        table = prescreen_sweep(sweep_file, workers, scheduler, _cluster_entries(cluster, cluster_set or []),
                                on_done=lambda done, total: bar.update(task, completed=done, total=total))
    _warn_outside_calibration(table, OUTSIDE_CALIBRATION)
    if plots is not None:
        from .prescreen import grid_points
        from .prescreen_plots import write_point_plots
        from .sweepfile import load_sweep

        write_point_plots(grid_points(load_sweep(sweep_file)), plots)
    if against is None:
        _emit(table.drop(columns=["reasons", OUTSIDE_CALIBRATION]) if fmt is TableFormat.table else table, fmt)
        return
    from .prescreen_plots import plot_agreement

    result = compare(sweep_file, against, table)
    _say("predicted vs simulated outcome per grid point (simulated: one per done replicate):")
    _emit(outcome_table(result.points), fmt)
    if not result.capacity.empty:
        _say("stability bound and simulated capacity per condition (capacity: capsweep capacity; at_least = top "
             "of the grid):")
        _emit(result.capacity, fmt)
    _say(f"outcome agreement: {result.agreement:.0%} of {len(result.points)} done points (replicates differ among "
         f"themselves: the most one verdict per grid point can reach here is {result.ceiling:.0%})")
    _say("confusion (rows: predicted, columns: simulated):\n" + result.confusion.to_string())
    path = plot_agreement(result, agreement_plot_path(against, plots))
    _say(str(path))


def _warn_outside_calibration(table: Any, column: str) -> None:
    """One warning line on stderr per grid point outside the surrogate's calibration box, naming where it leaves."""
    for _, row in table[table[column] != ""].iterrows():
        labels = ", ".join(f"{c}={row[c]}" for c in table.columns[:table.columns.get_loc("predicted_outcome")])
        typer.echo(f"capsweep: warning: {labels or 'the grid point'} lies outside the prescreen's calibration box "
                   f"({row[column]}); its runaway chance is extrapolated", err=True)


@app.command()
@user_errors
def check(sweep_file: Path = typer.Argument(..., help="TOML sweep file")) -> None:
    r"""Validate SWEEP_FILE and show its grid, distinct builds and simulated time, without simulating anything.

    A value outside its key's plausible range (a likely unit slip) prints a warning and is still accepted.
    To silence it, list the key in the sweep file: \[sweep] quiet_warnings = ["protocol.hold_s"].
    `capsweep keys` shows every key's allowed and plausible range.
    """
    from .sweepfile import load_sweep
    from .workload import workload

    sweep = load_sweep(sweep_file)
    work = workload(sweep)
    _say(f"{sweep_file}: valid; sweep {sweep.name!r}, store {sweep.store}")
    _print_workload(work)


def _print_workload(work: Any) -> None:
    """A workload.Workload: points by axis and replicates, each axis's values, builds and simulated time."""
    axes = " x ".join(f"{name} {len(values)}" for name, values in work.axes.items()) or "no axes"
    _say(f"{len(work.points)} points: {axes} x {work.replicates} replicates")
    for name, values in work.axes.items():
        _say(f"  {name}: {', '.join(map(str, values))}")
    _say(f"distinct network builds: {work.builds}; simulated time in all: {work.simulated_s:.0f} s")


@app.command()
@user_errors
def keys(
    table: str = typer.Option(None, "--table", help="only the keys under this table, e.g. plasticity.triplet"),
    markdown: bool = typer.Option(False, "--markdown", help="a markdown table (as in the README)"),
) -> None:
    """Every sweep-file key: default, unit, allowed values (and plausible range), description."""
    from .reference import keys_markdown, keys_text, keys_under

    chosen = keys_under(table)
    sys.stdout.write(keys_markdown(chosen) if markdown else keys_text(chosen))


@app.command("examples")
@user_errors
def examples_command(
    name: str = typer.Argument(None, help="the example to copy (without it: list the examples)"),
    to: Path = typer.Option(Path("."), "--to", help="folder to copy the example into"),
) -> None:
    """List the example sweep files shipped with capsweep, or copy example NAME into the working directory."""
    from .reference import copy_example, example_summary, examples

    if name is None:
        shipped = examples()
        width = max(map(len, shipped)) + 2
        for label, example in shipped.items():
            _say(f"{label:<{width}}{example_summary(example)}")
        _say("copy one with: capsweep examples NAME [--to DIR]")
        return
    target = copy_example(name, to)
    _say(f"wrote {target}; run it with: capsweep run {target}")


@app.command()
@user_errors
def estimate(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    workers: int = typer.Option(None, "--workers", min=1, help="worker count to estimate for"),
    engine: str = typer.Option(None, "--engine", help=f"engine to estimate for: {', '.join(NAMES)}"),
) -> None:
    """Show the expanded grid, distinct builds and an estimated wall time (calibrated by probe runs)."""
    from .workload import estimate_sweep

    _check_engine(engine)
    result = estimate_sweep(sweep_file, workers, engine,
                            on_probe=lambda n: err.print(f"probing a network of {n} E cells ..."))
    _print_workload(result.workload)
    for size, cost in sorted(result.costs.items()):
        out.print(f"  N_E {size}: {cost.per_sim_s:.2f} s wall per simulated s + {cost.overhead_s:.1f} s per point "
                  f"({result.engine})", highlight=False)
    out.print(f"estimated wall time on {result.workers} workers: {_duration(result.estimate_s)} "
              "(upper bound: points that run away stop early)", highlight=False)


def _duration(seconds: float) -> str:
    minutes, secs = divmod(int(round(seconds)), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min" if hours else f"{minutes} min {secs:02d} s"


def _check_engine(engine: str | None) -> None:
    if engine is not None and engine not in ENGINES:
        raise CapsweepError(f"--engine {engine!r} is not allowed: expected one of {', '.join(NAMES)}")


@app.command("upgrade")
@user_errors
def upgrade_command(store: Path = typer.Argument(..., help="Zarr store directory")) -> None:
    """Upgrade STORE in place to the store schema this capsweep writes (stored values stay as they are)."""
    from ..results_schema.upgrade import upgrade_store

    before, after = upgrade_store(store)
    said = f"{store} already has store schema {after}" if before == after else \
        f"{store} upgraded from store schema {before} to {after}"
    out.print(said, markup=False, highlight=False)


@app.command("trim-builds")
@user_errors
def trim_builds_command(
    max_mib: float = typer.Option(2048.0, "--max-mib", min=0.0, help="disk the build cache may keep, MiB"),
) -> None:
    """Remove least-recently-used compiled builds until the cache fits in --max-mib."""
    from ..runners.builds import build_root, prune_builds

    removed = prune_builds(int(max_mib * 2**20))
    out.print(f"removed {removed} builds from {build_root()}", markup=False, highlight=False)


def _emit(frame: Any, fmt: TableFormat) -> None:
    if fmt is TableFormat.csv:
        sys.stdout.write(frame.to_csv(index=False))
    elif fmt is TableFormat.json:
        sys.stdout.write(frame.to_json(orient="records", indent=1) + "\n")
    elif frame.empty:
        out.print("no matching points")
    else:
        sys.stdout.write(frame.to_string(index=False, float_format=lambda x: f"{x:.3g}") + "\n")


def main() -> None:
    """Console entry point: run the command, then leave without interpreter teardown.

    Tearing down the modules a sweep loads (xarray, zarr, Dask) takes about 0.4 s and has
    nothing left to save: every store write is synchronous, the Dask cluster is closed and the
    output streams are flushed here first.
    """
    try:
        app()
        code = 0
    except SystemExit as stop:
        code = stop.code if isinstance(stop.code, int) else (0 if stop.code is None else 1)
        if isinstance(stop.code, str):
            print(stop.code, file=sys.stderr)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


if __name__ == "__main__":
    main()
