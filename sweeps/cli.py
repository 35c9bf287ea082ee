"""The ``capsweep`` command line: a thin typer layer, one library function per command.

User errors (bad sweep file, foreign or locked store, bad filter) print one line on stderr and
exit non-zero without a traceback.
"""

from __future__ import annotations

import functools
import os
import sys
from collections.abc import Callable
from enum import StrEnum
from pathlib import Path
from typing import Any

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

from ..engines import ENGINES, NAMES
from ..errors import CapsweepError

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


def user_errors(command: Callable[..., Any]) -> Callable[..., Any]:
    """Turn CapsweepError into one line on stderr and its exit code; Ctrl-C into exit 130."""

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return command(*args, **kwargs)
        except CapsweepError as exc:
            typer.echo(f"capsweep: error: {exc}", err=True)
            raise typer.Exit(exc.exit_code) from None
        except KeyboardInterrupt:
            typer.echo("capsweep: interrupted; results stored so far are kept. Rerun the same command to resume.",
                       err=True)
            raise typer.Exit(130) from None

    return wrapper


@app.command()
@user_errors
def run(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    store: Path = typer.Option(None, "--store", help="Zarr store directory (default: [sweep].store)"),
    workers: int = typer.Option(None, "--workers", min=1, help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", help="address of a running Dask scheduler"),
    dashboard: bool = typer.Option(None, "--dashboard/--no-dashboard",
                                   help="serve the local cluster's Dask dashboard (default: execution.dashboard)"),
    engine: str = typer.Option(None, "--engine", help=f"override execution.engine: {', '.join(NAMES)}"),
    retry_failed: bool = typer.Option(False, "--retry-failed", help="run failed points again"),
    prescreen: bool = typer.Option(None, "--prescreen/--no-prescreen",
                                   help="store the theory prediction beside each point (default: execution.prescreen)"),
) -> None:
    """Run every point of SWEEP_FILE not yet done, writing each result into the store as it arrives."""
    from .launch import RunOptions, run_sweep

    _check_engine(engine)
    options = RunOptions(store=store, workers=workers, scheduler=scheduler, dashboard=dashboard, engine=engine,
                         prescreen=prescreen, retry_failed=retry_failed)
    with _ProgressView() as view:
        final = run_sweep(sweep_file, options, on_event=view.update)
    _print_run_summary(final)
    if final.failed:
        raise typer.Exit(1)


class _ProgressView:
    """Renders launch.Progress events as a rich progress bar with failures and ETA."""

    def __init__(self) -> None:
        self.bar = Progress(
            TextColumn("[bold]points"), BarColumn(), MofNCompleteColumn(),
            TextColumn("failed {task.fields[failed]}"), TimeElapsedColumn(), TextColumn("ETA"),
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
            self.task = self.bar.add_task("run", total=progress.to_run, failed=0, last="")
        if progress.dashboard and not self.dashboard_shown:
            self.bar.console.print(f"Dask dashboard: {progress.dashboard}")
            self.dashboard_shown = True
        self.bar.update(self.task, completed=progress.finished, failed=progress.failed, last=progress.last)


def _print_run_summary(progress: Any) -> None:
    outcomes = ", ".join(f"{k} {v}" for k, v in sorted(progress.outcomes.items())) or "none"
    engines = ", ".join(f"{k} {v}" for k, v in sorted(progress.engines.items())) or "none"
    err.print(
        f"ran {progress.finished} of {progress.to_run} points in {progress.elapsed_s:.1f} s "
        f"({progress.failed} failed; outcomes: {outcomes}; engines: {engines}); "
        f"{progress.already_done} were already stored"
    )
    asked = ENGINES.get(progress.engine)
    if asked is not None and asked.fallback and progress.engines.get(asked.fallback):
        err.print(f"note: some points ran on {asked.fallback} because the {asked.name} engine cannot express "
                  f"their settings ({asked.cannot})")


@app.command()
@user_errors
def status(store: Path = typer.Argument(..., help="Zarr store directory")) -> None:
    """Counts of points by status and outcome, and the base network's plausibility."""
    from ..results_schema.dataset import open_dataset
    from .query import plausibility, status_counts

    ds = open_dataset(store)
    counts = status_counts(ds)
    out.print(f"store {store}: sweep {ds.attrs.get('sweep_name', '?')!r}, {int(ds['status'].size)} points")
    out.print("status:  " + ", ".join(f"{k} {v}" for k, v in counts["status"].items()))
    out.print("outcome: " + ", ".join(f"{k} {v}" for k, v in counts["outcome"].items()) + "  (done points)")
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
    everything: bool = typer.Option(False, "--all", help="every point, not only the stable ones"),
) -> None:
    """List configurations with their outcome and metrics (default: the stable ones)."""
    from ..results_schema.dataset import open_dataset
    from .query import DEFAULT_WHERE, point_table, select, sweep_dims

    ds = open_dataset(store)
    rows = select(point_table(ds), "" if everything else (where or DEFAULT_WHERE))
    if fmt is TableFormat.table:
        rows = rows[[*sweep_dims(ds), *SUMMARY_COLUMNS]]
    _emit(rows, fmt)


@app.command()
@user_errors
def capacity(
    store: Path = typer.Argument(..., help="Zarr store directory"),
    min_fraction: float = typer.Option(0.5, "--min-fraction",
                                       help="fraction of replicates in which each count up to capacity must succeed"),
    per_count: bool = typer.Option(False, "--per-count", help="csv/json: the per-count success table instead"),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", help="table, csv or json"),
) -> None:
    """Capacity per cell of the other axes: largest assembly count whose every smaller count succeeds.

    A point succeeds when it is done, stable and recalls every assembly. The table shows each
    count's success fraction with its 95 % Wilson interval, then the capacity with the range of
    the per-replicate capacities; 'at least' marks the top of the grid, NA a cell with pending points.
    """
    from ..results_schema.dataset import open_dataset
    from .capacity import capacity_table, count_dim, scaling_fit, success_table

    ds = open_dataset(store)
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
                     "pending", "failed")


def _capacity_display(table: Any) -> Any:
    """The capacity table as shown on screen: 'at least k' at the top of the grid, NA for undecided cells."""
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
    out_dir: Path = typer.Option(Path("plots"), "--out", help="folder for the PNG files"),
    x: str = typer.Option(None, "--x", help="axis across the stability map (default: the first axis)"),
    y: str = typer.Option(None, "--y", help="axis up the stability map (default: the second axis)"),
) -> None:
    """Write PNGs: stability map, capacity curves, rate traces and weight drift."""
    from ..results_schema.dataset import open_dataset
    from .plots import all_plots

    for path in all_plots(open_dataset(store), out_dir, x, y):
        out.print(str(path), markup=False, highlight=False)


@app.command("prescreen")
@user_errors
def prescreen_command(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    plots: Path = typer.Option(None, "--plots", help="folder for transfer-curve and drift-curve PNGs per cell"),
    workers: int = typer.Option(None, "--workers", min=1, help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", help="address of a running Dask scheduler"),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", help="table, csv or json"),
) -> None:
    """Predict each grid cell's outcome from mean-field theory, without simulating."""
    from .prescreen import prescreen_sweep

    with Progress(TextColumn("[bold]cells"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                  console=err) as bar:
        task = bar.add_task("prescreen", total=None)
        table = prescreen_sweep(sweep_file, workers, scheduler, plots,
                                on_done=lambda done, total: bar.update(task, completed=done, total=total))
    _emit(table.drop(columns=["reasons"]) if fmt is TableFormat.table else table, fmt)


@app.command()
@user_errors
def plan(
    sweep_file: Path = typer.Argument(..., help="TOML sweep file"),
    workers: int = typer.Option(None, "--workers", min=1, help="worker count to estimate for"),
    engine: str = typer.Option(None, "--engine", help=f"engine to estimate for: {', '.join(NAMES)}"),
) -> None:
    """Show the expanded grid, distinct builds and an estimated wall time (calibrated by probe runs)."""
    from .plan import plan_sweep

    _check_engine(engine)
    result = plan_sweep(sweep_file, workers, engine,
                        on_probe=lambda n: err.print(f"probing a network of {n} E cells ..."))
    axes = " x ".join(f"{name} {n}" for name, n in result.axes.items()) or "no axes"
    out.print(f"{result.points} points: {axes} x {result.replicates} replicates", highlight=False)
    out.print(f"distinct network builds: {result.builds}; simulated time in all: {result.simulated_s:.0f} s")
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


@app.command("prune-builds")
@user_errors
def prune_builds_command(
    keep_mib: float = typer.Option(2048.0, "--keep-mib", min=0.0, help="disk the build cache may keep, MiB"),
) -> None:
    """Remove least-recently-used compiled builds until the cache fits in --keep-mib."""
    from ..runners.builds import build_root, prune_builds

    removed = prune_builds(int(keep_mib * 2**20))
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
