"""The ``capsweep`` command line: a thin typer layer, one library function per command.

Every error a user can fix (bad sweep file, foreign or locked store, bad filter, a file-system fault, a
mistyped option) prints one ``capsweep: error:`` line on stderr and exits non-zero without a traceback.
Help is plain text (no markup: ``[unit]`` and ``[sweep]`` show as written).
"""

from __future__ import annotations

import functools
import math
import os
import sys
import tomllib
import warnings
from collections.abc import Callable, Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from typer.core import TyperGroup

from .. import __version__
from ..clusters import NAMES as CLUSTER_KINDS
from ..controls import CONTROL_DIM
from ..engines import ENGINES, NAMES
from ..errors import CapsweepError, StoreError, fault_line
from ..flags import DONE, FAILED, PENDING, UNNEEDED
from ..interrupts import ignore_interrupts_if_spawned, stop_on_terminate
from ..registry import ImplausibleValue
from ..results_schema import attrs
from ..results_schema.layout import TIMINGS
from .success import MIN_FRACTION

ignore_interrupts_if_spawned()  # also when run as `python -m capsweep.sweeps.cli`

USAGE_EXIT = 2
"""Exit code of a command line that does not parse (a missing argument, an unknown option)."""


class _OneLineErrors(TyperGroup):
    """The command group: a command line that does not parse gets the same one-line error as any user error."""

    def main(self, args: Sequence[str] | None = None, prog_name: str | None = None, complete_var: str | None = None,
             standalone_mode: bool = True, windows_expand_args: bool = True, **extra: Any) -> Any:
        try:
            code = super().main(args, prog_name, complete_var, standalone_mode=False,
                                windows_expand_args=windows_expand_args, **extra)
        except typer.TyperException as exc:  # the framework's usage errors
            typer.echo(f"capsweep: error: {_usage_message(exc)}", err=True)
            code = getattr(exc, "exit_code", USAGE_EXIT)
        except typer.Abort:
            typer.echo("capsweep: interrupted", err=True)
            code = 130
        if not standalone_mode:
            return code
        sys.exit(code if isinstance(code, int) else 0)


def _usage_message(exc: Any) -> str:
    """A usage error as one sentence with the command's help to turn to."""
    message = " ".join(str(exc.format_message()).split())
    context = getattr(exc, "ctx", None)
    command = context.command_path.split()[-1] if context is not None and context.parent is not None else ""
    return f"{message} (see `{' '.join(['capsweep', command]).strip()} --help`)"


app = typer.Typer(
    cls=_OneLineErrors, add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
    rich_markup_mode=None,
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
        except OSError as exc:  # a file-system fault the command did not name itself
            typer.echo(f"capsweep: error: {fault_line(exc)}", err=True)
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
    sweep_file: Path = typer.Argument(..., metavar="SWEEP", help="TOML sweep file"),
    store: Path = typer.Option(None, "--store", metavar="PATH", help="Zarr store directory (default: [sweep].store)"),
    workers: int = typer.Option(None, "--workers", min=1, metavar="N", help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", metavar="ADDR", help="address of a running Dask scheduler"),
    dashboard: bool = typer.Option(None, "--dashboard/--no-dashboard",
                                   help="serve the local cluster's Dask dashboard (default: execution.dashboard)"),
    engine: str = typer.Option(None, "--engine", metavar="NAME", help=f"override execution.engine: {', '.join(NAMES)}"),
    retry_failed: bool = typer.Option(False, "--retry-failed", help="run failed points again"),
    prescreen: bool = typer.Option(None, "--prescreen/--no-prescreen",
                                   help="store the prescreen's predicted outcome beside each point "
                                        "(default: execution.prescreen)"),
    cluster: str = typer.Option(None, "--cluster", metavar="KIND", help=_CLUSTER_HELP),
    cluster_set: list[str] = typer.Option(None, "--cluster-set", metavar="NAME=VALUE", help=_CLUSTER_SET_HELP),
) -> None:
    """Run every point of SWEEP not yet done, writing each result into the store as it arrives.

    Progress goes to stderr: one line redrawn on a terminal, a plain line every few seconds in a file or
    pipe. The last lines name the store and the command to run next. Ctrl-C or SIGTERM stops the run quietly,
    keeping what was stored.
    """
    from .launch import RunOptions, run_sweep
    from .runview import ProgressView

    stop_on_terminate()
    _check_engine(engine)
    options = RunOptions(store=store, workers=workers, scheduler=scheduler, dashboard=dashboard, engine=engine,
                         prescreen=prescreen, retry_failed=retry_failed,
                         cluster=_cluster_entries(cluster, cluster_set or []))
    with ProgressView(err) as view:
        final = run_sweep(sweep_file, options, on_event=view.update)
    for line in run_summary(final, sweep_file):
        _note(line)
    if final.failed or final.failed_before:
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


def run_summary(progress: Any, sweep_file: Path) -> list[str]:
    """The closing lines of a run: what ran, on how many workers, what failed, and the command to run next."""
    from .tables import duration_text

    outcomes = ", ".join(f"{k} {v}" for k, v in sorted(progress.outcomes.items())) or "none"
    engines = ", ".join(f"{k} {v}" for k, v in sorted(progress.engines.items())) or "none"
    store = progress.store
    if progress.to_run:
        lines = [f"ran {progress.finished} of {progress.to_run} points in {duration_text(progress.elapsed_s)} on "
                 f"{progress.worker_count()} workers ({progress.failed} failed; outcomes: {outcomes}; engines: "
                 f"{engines}); {progress.already_done - progress.failed_before} were already stored"
                 + (f"; {progress.unneeded} the count search did not need" if progress.unneeded else "")]
    else:
        lines = [f"nothing to run: {progress.already_done - progress.failed_before} of {progress.total} points "
                 "were already stored"]
    asked = ENGINES.get(progress.engine)
    if asked is not None and asked.fallback and progress.engines.get(asked.fallback):
        lines.append(f"note: some points ran on {asked.fallback} because the {asked.name} engine cannot express "
                     f"their settings ({asked.cannot})")
    single = {name for name in progress.engines if not ENGINES[name].threads}
    if progress.threads > 1 and single:
        lines.append(f"note: points on {', '.join(sorted(single))} ran on one thread: execution.threads = "
                     f"{progress.threads} applies to the {', '.join(e.name for e in ENGINES.values() if e.threads)} "
                     "engine only")
    failed = progress.failed + progress.failed_before
    if progress.failed_before:
        lines.append(f"{progress.failed_before} points failed in an earlier run and were not run again: "
                     f"`capsweep status {store} --failed` shows why, `capsweep run {sweep_file} --retry-failed` "
                     "runs them again")
    if failed:
        lines.append(f"store: {store}; next: capsweep status {store} --failed ({failed} failed points)")
    else:
        lines.append(f"store: {store}; next: capsweep capacity {store}")
    return lines


def _note(line: str) -> None:
    """One line on stderr, never wrapped or marked up."""
    err.print(line, markup=False, highlight=False, soft_wrap=True)


_STORE = typer.Argument(..., metavar="STORE", help="Zarr store directory")
_FORMAT_HELP = "table, csv or json"
_WIDE_HELP = f"table: show every column (by default all-zero count columns are left out and the table fits " \
             f"{100} characters)"


@app.command()
@user_errors
def status(
    store: Path = _STORE,
    failed: bool = typer.Option(False, "--failed", help="list failed points grouped by error: the error line, then "
                                "the labels and id of each point that failed with it"),
) -> None:
    """Counts of points by every status and by outcome, and the base network's plausibility."""
    from .query import failures_by_error, open_store, plausibility, status_counts

    ds = open_store(store, "status")
    counts = status_counts(ds)
    _say(f"store {store}: sweep {ds.attrs.get(attrs.SWEEP_NAME, '?')!r}, {int(ds['status'].size)} points")
    _say("status:  " + ", ".join(f"{k} {v}" for k, v in counts["status"].items()))
    _say("outcome: " + ", ".join(f"{k} {v}" for k, v in counts["outcome"].items()) + "  (done points)")
    if failed:
        for error, points in failures_by_error(ds).items():
            _say(f"failed {len(points)}x: {error}")
            for point in points:
                labels = " ".join(f"{dim}={value}" for dim, value in point.labels.items())
                _say(f"  {labels} ({point.point_id})")
    if counts["status"][DONE] == 0:
        _say("no point done yet")
        return
    check = plausibility(ds)
    _say(f"baseline E rate {check.rate_exc_hz[0]:.2f}-{check.rate_exc_hz[1]:.2f} Hz, "
         f"I rate {check.rate_inh_hz[0]:.2f}-{check.rate_inh_hz[1]:.2f} Hz, "
         f"ISI CV {check.isi_cv[0]:.2f}-{check.isi_cv[1]:.2f}")
    for warning in check.warnings:
        _say(f"warning: {warning}")


SUMMARY_COLUMNS = (
    "status", "success", "outcome", "recalled_count", "recall_score_min", "runaway_onset_s", "rate_exc_baseline_hz",
    "weight_correlation_end", "assembly_contrast_end", "wall_time_s",
)
"""Columns of the query table after the sweep dims, most important first (the last ones give way to the width)."""


@app.command()
@user_errors
def query(
    store: Path = _STORE,
    where: str = typer.Option(None, "--where", metavar="EXPR",
                              help='pandas filter on the columns, added to the default filter unless --all, e.g. '
                                   '\'n_odours >= 2 and recall_score_min > 0.6\''),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", metavar="FORMAT", help=_FORMAT_HELP),
    everything: bool = typer.Option(False, "--all", help="drop the default filter (done, stable); --where still "
                                    "applies"),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """List points with their status, success, outcome and metrics in sweep order (default: the done, stable ones).

    The filter applied is stated on stderr in every format. success: the point is done, stable and recalls
    every assembly (NA unless done). Columns of csv and json: the sweep axes in sweep-file order,
    replicate, point_id, status, success, the scalar metrics, then per-point summaries. Integers have no
    decimals; missing values are empty (csv) or null (json). csv: a column with a physical unit (the
    store's CF units) is headed 'name [unit]' unless its name ends in the unit (wall_time_s). json: one
    object {"units": {column: unit}, "filter": expression, "rows": [{column: value}, ...]}, as capacity
    writes it.
    """
    from .capacity import point_success
    from .query import active_filter, column_units, open_store, point_table, select, sweep_dims

    ds = open_store(store, "query")
    expression, description = active_filter(where, everything)
    rows = select(point_table(ds, point_success(ds)), expression)
    _note(f"filter: {description}")
    if fmt is TableFormat.table:
        _table(rows[[*sweep_dims(ds), *SUMMARY_COLUMNS]], sweep_dims(ds), wide, durations=TIMINGS)
        return
    _emit(rows, fmt, column_units(ds, list(rows.columns)), expression)


@app.command()
@user_errors
def capacity(
    store: Path = _STORE,
    min_fraction: float = typer.Option(MIN_FRACTION, "--min-fraction", metavar="F",
                                       help="success fraction where the fitted curve gives the capacity, and that each "
                                            "count up to the first-failure capacity must reach (at 1 the fit is NA)"),
    per_count: bool = typer.Option(False, "--per-count", help="only the per-count success table (every format)"),
    controls: bool = typer.Option(False, "--controls",
                                  help="csv/json: each control's success per condition instead (control dim)"),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", metavar="FORMAT", help=_FORMAT_HELP),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """Capacity per condition (combination of the other axes): where the fitted success curve crosses the
    fraction, with its 95 % interval.

    A point succeeds when it is done, stable and recalls every assembly; pending, unneeded and crashed
    points never count as failures. The table shows each count's success fraction with its 95 % Wilson
    interval, then per condition the fitted capacity with its 95 % interval; 'censored' marks a capacity the
    grid does not bracket: 'lower bound' (the fitted crossing lies above the largest count decided: the
    capacity is at least the number shown) or 'upper bound' (below the smallest: the capacity lies under it),
    with an open interval end shown as '..'. Beside it the
    first-failure capacity (largest count whose every smaller count passes; a lower bound at the top count;
    NA while a point is pending) and the decided replicates the fit used. csv and json write one table (the
    capacity table, or with --per-count the per-count table); json as {"units", "filter", "rows"}, as query
    writes it. A store with controls ([controls] in the sweep file) also shows each condition's capacity
    beside its controls' success, and flags a condition whose sham or unstructured control succeeds beyond
    chance at the recall test's false-positive rate (detection.recall_alpha); with --controls, csv and json
    write that table.
    """
    from .capacity import capacity_report, count_dim, scaling_fit, scaling_sizes, success_table
    from .control_table import control_success
    from .query import open_store, sweep_dims

    ds = open_store(store, "capacity")
    table = capacity_report(ds, min_fraction)
    labels = [d for d in sweep_dims(ds) if d in table.columns or d == count_dim(ds)]
    if fmt is not TableFormat.table:
        _emit(success_table(ds) if per_count else control_success(ds) if controls else table, fmt, {}, "")
        return
    _say("success per count (n = done replicates; 95 % Wilson interval; crashed points left out):")
    _table(success_table(ds), labels, wide, hide_zero=_STATUS_COUNTS)
    if per_count:
        return
    _say(f"\ncapacity (fitted success curve crosses {min_fraction:g}; 95 % profile-likelihood interval; censored: "
         "the crossing lies beyond the counts decided; first_failure: largest count whose every smaller count "
         "passes, a lower bound at the top count):")
    shown = _capacity_display(table)
    _table(shown, labels, wide, hide_zero=_STATUS_COUNTS)
    _print_controls(control_success(ds), shown, labels)
    _say_scaling(scaling_fit(ds, min_fraction), scaling_sizes(ds) is not None)
    others = [c for c in table.columns if c not in _CAPACITY_COLUMNS]
    for _, row in table[table["non_monotone"]].iterrows():
        where = ", ".join(f"{c}={row[c]}" for c in others) or "the grid"
        _say(f"warning: success is not monotone in {count_dim(ds)} for {where}: larger counts succeed more often "
             "than chance allows after smaller ones failed")


@app.command("retention")
@user_errors
def retention_command(
    store: Path = _STORE,
    age: bool = typer.Option(False, "--age", help="forgetting by memory age (blocked learning) instead of retention "
                                                  "by delay after hold start"),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", metavar="FORMAT", help=_FORMAT_HELP),
    wide: bool = typer.Option(False, "--wide", help=_WIDE_HELP),
) -> None:
    """Recall against time per condition: the fraction of cued odours recalled at each recall test's delay after hold
    start (with --age: at each memory age in learning blocks), the delay in seconds (delay_s) and in multiples of
    the condition's plasticity.heterosynaptic.tau_consolidation_s (delay_tau).

    Columns: the sweep axes, the test (retention) or age, delay_s, delay_tau, fraction (mean over done replicates),
    replicates, recalled and tested (counts pooled over them), wilson_lo and wilson_hi (95 % Wilson interval of the
    pooled counts: it treats tests within a replicate as independent, which they are not), t_lo and t_hi (95 %
    Student-t interval across replicates: zero width when the replicates agree). Failed and unreached tests are left
    out. json as {"units", "filter", "rows"}, as query writes it.
    """
    from .query import open_store, sweep_dims
    from .retention import forgetting_table, retention_table

    ds = open_store(store, "retention")
    table = forgetting_table(ds) if age else retention_table(ds)
    if fmt is not TableFormat.table:
        _emit(table, fmt, {"delay_s": "s"}, "")
        return
    if table.empty:
        _say("no recall test by memory age: no point learned in blocks (protocol.imprint_order = 'blocked')" if age
             else "no recall test of a done point")
        return
    labels = [*[d for d in sweep_dims(ds) if d in table.columns], "age" if age else "retention"]
    _say(f"recall by {'memory age (learning blocks)' if age else 'recall test'}: delay in s and in tau_consolidation; "
         "fraction: mean over done replicates; 95 % Wilson interval of the pooled counts, 95 % t interval across "
         "replicates (read the wider):")
    first = [*labels, "delay_s", "delay_tau", "fraction", "wilson_lo", "wilson_hi", "t_lo", "t_hi"]
    _table(table[[*first, *(c for c in table.columns if c not in first)]], labels, wide)


def _print_controls(controls: Any, shown: Any, labels: Sequence[str]) -> None:
    """Each condition's capacity (as ``shown``) beside its ``controls``' success, and one warning per flag."""
    from .control_table import STAT_COLUMNS, controls_beside

    if controls.empty:
        return
    _say("\ncontrols beside each condition (success over every count and replicate, 95 % Wilson interval; "
         "over_alpha: sham or unstructured succeeding beyond chance at the recall test's false-positive rate):")
    _table(controls_beside(shown, controls, ("capacity", CENSORED, "interval_95")), labels, wide=True)
    others = [c for c in controls.columns if c not in (*STAT_COLUMNS, CONTROL_DIM)]
    for _, row in controls[controls["flagged"]].iterrows():
        where = ", ".join(f"{c}={row[c]}" for c in others) or "the grid"
        _say(f"warning: the {row[CONTROL_DIM]} control of {where} succeeds in {row['successes']} of {row['n']} points "
             f"(95 % Wilson interval {row['wilson_lo']:.3f}-{row['wilson_hi']:.3f}), above the recall test's "
             f"false-positive rate {row['alpha']:g}: success there does not need the memory or its cue")


def _say(line: str) -> None:
    """One line of a report on stdout, never wrapped at the terminal width (so it stays greppable)."""
    out.print(line, highlight=False, markup=False, soft_wrap=True)


def _say_scaling(fit: Any, over_sizes: bool) -> None:
    """The power-law fit of capacity against n_exc with its interval and caveats; ``over_sizes``: the store sweeps
    network sizes (then a missing fit is said, not left silent)."""
    if fit is None:
        if over_sizes:
            from .scaling_fit import NO_FIT

            _say(NO_FIT)
        return
    _say(f"capacity ~ {fit.prefactor:.3g} x n_exc^b, b = {fit.exponent:.2f} "
         f"[{fit.exponent_low:.2f}, {fit.exponent_high:.2f}] (95 % profile likelihood, censored capacities as "
         f"bounds; sizes {', '.join(f'{n:g}' for n in sorted(set(fit.sizes)))})")
    for caveat in fit.caveats:
        _say(f"caveat: {caveat}")


_STATUS_COUNTS = (PENDING, FAILED, UNNEEDED)
CENSORED = "censored"
"""Column of the capacity tables: where the count grid does not bracket the fitted capacity (see
:data:`_CENSORED_TEXT` for how it is shown)."""
_CAPACITY_COLUMNS = ("capacity", "capacity_lo", "capacity_hi", CENSORED, "bound", "first_failure",
                     "first_failure_at_least", "non_monotone", "replicates", *_STATUS_COUNTS)
_CENSORED_TEXT = {"above": "lower bound", "below": "upper bound", "": ""}
"""The censoring side of :func:`capsweep.sweeps.capacity.capacity_report` as shown beside the bound it makes."""


def _capacity_display(table: Any) -> Any:
    """The capacity table as shown: the fitted capacity stays a number (its bound when censored), its censoring a
    column of its own, the 95 % interval as 'lo-hi', then the first-failure capacity and the replicates used."""
    shown = table[[c for c in table.columns if c not in _CAPACITY_COLUMNS]].copy()
    inside = table[CENSORED] == ""
    shown["capacity"] = table["capacity"].where(inside, table["bound"].astype(float))
    shown[CENSORED] = table[CENSORED].map(_CENSORED_TEXT)
    shown["interval_95"] = [_interval_text(row.capacity_lo, row.capacity_hi) for row in table.itertuples()]
    for column in ("first_failure", "replicates", "non_monotone", *_STATUS_COUNTS):
        shown[column] = table[column]
    return shown


def _interval_text(low: float, high: float) -> str:
    """'4.90-6.70'; an open end (beyond the grid) is '..'; 'NA' when both are open."""
    if math.isnan(low) and math.isnan(high):
        return "NA"
    return f"{'..' if math.isnan(low) else f'{low:.2f}'}-{'..' if math.isnan(high) else f'{high:.2f}'}"


@app.command()
@user_errors
def plot(
    store: Path = _STORE,
    out_dir: Path = typer.Option(Path("plots"), "--out", metavar="DIR",
                                 help="folder for the figures (created if missing)"),
    x: str = typer.Option(None, "--x", metavar="DIM",
                          help="sweep dim across the stability map (default: the first axis)"),
    y: str = typer.Option(None, "--y", metavar="DIM", help="sweep dim up the stability map (default: the first "
                          "other axis; none: one row)"),
    capacity_axis: str = typer.Option(None, "--capacity-against", metavar="AXIS",
                                      help="axis to draw capacity against (default: every axis but the count)"),
    formats: list[str] = typer.Option(None, "--format", metavar="FORMAT",
                                      help="png, svg or pdf; repeat or comma-separate (default: png)"),
    dpi: int = typer.Option(None, "--dpi", metavar="N", help="resolution of PNG files, dots per inch (default: 200)"),
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
    store: Path = _STORE,
    netcdf: Path = typer.Option(None, "--netcdf", metavar="FILE",
                                help="new netCDF-4 file: the whole store, CF conventions"),
    csv: Path = typer.Option(None, "--csv", metavar="FILE",
                             help="new CSV file: every point, columns as `query --all --format csv`"),
) -> None:
    """Write the store for other tools; folders are created as needed, existing files never overwritten.

    --netcdf writes every variable with its CF metadata (checked with the IOOS compliance checker's CF
    suite); text axes become an index with the values in '<axis>_value'. --csv writes the point table of
    every point, with units in the headers as `capsweep query --format csv` writes them. Each file is
    written even if the other cannot be; each fault is one error line.
    """
    from .export import write_csv, write_netcdf
    from .query import open_store

    if netcdf is None and csv is None:
        raise CapsweepError("capsweep export needs --netcdf FILE, --csv FILE or both")
    ds = open_store(store, "export")
    writers: list[tuple[Path, Callable[[], None]]] = []
    if netcdf is not None:
        writers.append((netcdf, lambda: write_netcdf(ds, store, netcdf)))
    if csv is not None:
        writers.append((csv, lambda: write_csv(ds, csv)))
    faults = []
    for path, write in writers:
        try:
            write()
            _say(str(path))
        except CapsweepError as exc:
            faults.append(exc)
            _note(f"capsweep: error: {exc}")
    if faults:
        raise typer.Exit(faults[0].exit_code)


@app.command("prescreen")
@user_errors
def prescreen_command(
    sweep_file: Path = typer.Argument(..., metavar="SWEEP", help="TOML sweep file"),
    plots: Path = typer.Option(None, "--plots", metavar="DIR",
                               help="folder for transfer-curve and drift-curve PNGs per grid point"),
    workers: int = typer.Option(None, "--workers", min=1, metavar="N", help="local Dask worker processes"),
    scheduler: str = typer.Option(None, "--scheduler", metavar="ADDR", help="address of a running Dask scheduler"),
    cluster: str = typer.Option(None, "--cluster", metavar="KIND", help=_CLUSTER_HELP),
    cluster_set: list[str] = typer.Option(None, "--cluster-set", metavar="NAME=VALUE", help=_CLUSTER_SET_HELP),
    fmt: TableFormat = typer.Option(TableFormat.table, "--format", metavar="FORMAT", help=_FORMAT_HELP),
    against: Path = typer.Option(None, "--against", metavar="STORE",
                                 help="store this sweep ran into: print agreement with it and write a PNG "
                                      "(into --plots, else next to the store)"),
) -> None:
    """Predict each grid point's outcome without simulating: a surrogate fitted to simulations, built on
    mean-field quantities. Also each condition's stability bound (the largest count up to which every count is
    predicted stable; recall does not enter). Points outside the surrogate's calibration box are named in a
    warning. Runs on the sweep's [execution.cluster] like `capsweep run`."""
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
def check(sweep_file: Path = typer.Argument(..., metavar="SWEEP", help="TOML sweep file")) -> None:
    """Validate SWEEP and show its grid, the engine of each distinct build and the simulated time, without
    simulating anything.

    Keys that contradict each other (assemblies.size beside a coding level, initial weights above w_max)
    are refused. A value outside its key's plausible range (a likely unit slip) prints a warning and is
    still accepted; to silence it, list the key in the sweep file: [sweep] quiet_warnings =
    ["protocol.hold_s"]. `capsweep keys` shows every key's allowed and plausible range.
    """
    from .sweepfile import load_sweep
    from .workload import engine_plan, workload

    sweep = load_sweep(sweep_file)
    work = workload(sweep)
    _say(f"{sweep_file}: valid; sweep {sweep.name!r}, store {sweep.store}")
    _print_workload(work)
    for build in engine_plan(work.grid):
        _say(f"  {build.describe()}")


def _print_workload(work: Any) -> None:
    """A workload.Workload: points by axis and replicates, each axis's values, builds and simulated time."""
    from .tables import duration_text

    axes = " x ".join(f"{name} {len(values)}" for name, values in work.axes.items()) or "no axes"
    _say(f"{work.n_points} points: {axes} x {work.replicates} replicates")
    for name, values in work.axes.items():
        _say(f"  {name}: {', '.join(map(str, values))}")
    _say(f"simulated time in all: {duration_text(work.simulated_s)}; distinct network builds: {work.builds}")


@app.command()
@user_errors
def keys(
    table: str = typer.Option(None, "--table", metavar="TABLE",
                              help="only the keys under this table, e.g. plasticity.triplet"),
    markdown: bool = typer.Option(False, "--markdown", help="a markdown table (as in the README)"),
) -> None:
    """Every sweep-file key: default, unit, allowed values (and plausible range), description."""
    from .reference import keys_markdown, keys_text, keys_under

    chosen = keys_under(table)
    sys.stdout.write(keys_markdown(chosen) if markdown else keys_text(chosen))


@app.command("examples")
@user_errors
def examples_command(
    name: str = typer.Argument(None, metavar="NAME", help="the example to copy (without it: list the examples)"),
    to: Path = typer.Option(Path("."), "--to", metavar="DIR", help="folder to copy the example into (created if "
                            "missing)"),
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
    sweep_file: Path = typer.Argument(..., metavar="SWEEP", help="TOML sweep file"),
    workers: int = typer.Option(None, "--workers", min=1, metavar="N", help="worker count to estimate for"),
    engine: str = typer.Option(None, "--engine", metavar="NAME", help=f"engine to estimate for: {', '.join(NAMES)}"),
) -> None:
    """Show the expanded grid, distinct builds and an estimated wall time from this machine's cost model.

    The model (kept in $CAPSWEEP_COST_FILE, default ~/.cache/capsweep/costs.json) learns from the sweep's store when
    it holds done points, and probes a network size it does not cover yet (a few short runs, once per size).
    """
    from .costs import cost_file
    from .tables import duration_text
    from .workload import estimate_sweep

    _check_engine(engine)
    result = estimate_sweep(sweep_file, workers, engine,
                            on_probe=lambda n: err.print(f"probing a network of {n} E cells ..."))
    _print_workload(result.workload)
    measured = result.measured
    if measured is not None:
        out.print(f"measured: {measured.points} done points took {measured.measured_s:.1f} s (set-up + run); the cost "
                  f"model without them gave {measured.estimated_s:.1f} s ({measured.error:+.0%})",
                  highlight=False)
    for size, entry in sorted(result.model.sizes.items()):
        cost = entry.cost
        out.print(f"  N_E {size}: {cost.per_sim_s:.3f} s wall per simulated s + {cost.overhead_s:.2f} s per point "
                  f"({result.engine}; {entry.source}, {entry.on})", markup=False, highlight=False)
    compiles = (f"; {result.uncompiled} build(s) to compile, {result.model.compile_s:.0f} s each"
                if result.uncompiled else "")
    out.print(f"estimated wall time on {result.workers} workers: {duration_text(result.estimate_s)} "
              f"(upper bound: points that run away stop early{compiles}); cost model: {cost_file()}",
              markup=False, highlight=False)
    out.print(layout_advice(result.workload.n_points, result.engine), markup=False, highlight=False)


def layout_advice(points: int, engine: str) -> str:
    """What ``estimate`` advises for ``points`` points on ``engine`` with the cores this process may use."""
    from .workload import advised_layout

    cores = len(os.sched_getaffinity(0))
    workers, threads = advised_layout(points, cores, ENGINES[engine].threads)
    advice = f"for {points} points on the {cores} cores here: execution.workers = {workers}"
    if threads == 1:
        return f"{advice}, execution.threads = 1 (a worker process per point, up to the cores)"
    return (f"{advice}; the cores left spare could run execution.threads = {threads} per point, but measure the gain "
            "first with benchmarks/bench_threads.py (on a 2-core machine 2 threads cost twice the CPU and saved no "
            "wall time), and a point's result depends on its thread count")


def _check_engine(engine: str | None) -> None:
    if engine is not None and engine not in ENGINES:
        raise CapsweepError(f"--engine {engine!r} is not allowed: expected one of {', '.join(NAMES)}")


@app.command("upgrade")
@user_errors
def upgrade_command(store: Path = _STORE) -> None:
    """Upgrade STORE in place to the store schema this capsweep writes (stored values stay as they are)."""
    from ..results_schema.upgrade import upgrade_store

    before, after = upgrade_store(store)
    said = f"{store} already has store schema {after}" if before == after else \
        f"{store} upgraded from store schema {before} to {after}"
    _say(said)


@app.command()
@user_errors
def replay(
    store: Path = _STORE,
    point_id: str = typer.Argument(..., metavar="POINT_ID",
                                   help="the point to rerun (the point_id column of `query --all --format csv`)"),
    out_dir: Path = typer.Option(Path("replays"), "--out", metavar="DIR",
                                 help="folder for the figures and the NWB file (created if missing)"),
) -> None:
    """Rerun one done point with its own seeds on the engine that ran it, check that it reproduces its stored
    metrics exactly, and write its spike raster, population and assembly rates and E->E weight matrices as PNG
    figures and its spikes as an NWB file (readable with pynwb). Exits 1 if a stored metric is not reproduced.
    """
    from ..outputs import check_folder
    from .replay import replay as rerun
    from .replay import summary, write_outputs

    check_folder(out_dir, "--out")
    run = rerun(store, point_id)
    for line in summary(run):
        _say(line)
    for path in write_outputs(run, out_dir):
        _say(str(path))
    if run.differing:
        raise typer.Exit(1)


@app.command("shrink-builds")
@user_errors
def shrink_builds_command(
    to_mib: float = typer.Option(2048.0, "--to-mib", min=0.0, metavar="M",
                                 help="size the build cache may keep, MiB"),
) -> None:
    """Remove the compiled builds used longest ago until the build cache takes at most --to-mib MiB."""
    from ..runners.builds import build_root, prune_builds

    removed = prune_builds(int(to_mib * 2**20))
    _say(f"removed {removed} builds from {build_root()}")


def _emit(frame: Any, fmt: TableFormat, units: dict[str, str] | None = None, where: str = "") -> None:
    """``frame`` as csv, json (``{"units", "filter", "rows"}``) or a table with every column."""
    from .query import table_csv, table_json

    if fmt is TableFormat.csv:
        sys.stdout.write(table_csv(frame, units or {}))
    elif fmt is TableFormat.json:
        sys.stdout.write(table_json(frame, units or {}, where))
    else:
        _table(frame, [], wide=True)


def _table(frame: Any, labels: Sequence[str], wide: bool, hide_zero: Sequence[str] = (),
           durations: Sequence[str] = ()) -> None:
    """``frame`` as an aligned table on stdout (:func:`capsweep.sweeps.tables.render`); what was left out on
    stderr."""
    from .tables import render

    if frame.empty:
        _say("no matching points")
        return
    shown = render(frame, keep=labels, hide_zero=hide_zero, durations=durations, wide=wide)
    sys.stdout.write(shown.text)
    if shown.note():
        _note(shown.note())


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
