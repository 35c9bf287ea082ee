"""How `capsweep run` reports: progress that fits any width, plain lines in a log, a closing line that names the
store and the next command, and tables whose numbers read evenly (a newcomer's findings, December 2026)."""

from __future__ import annotations

import io
import re
import time
from pathlib import Path

import pandas as pd
import pytest

from capsweep.sweeps.cli import run_summary
from capsweep.sweeps.launch import Progress
from capsweep.sweeps.query import table_csv
from capsweep.sweeps.runview import EVERY_S, PlainLines, status_line
from capsweep.sweeps.tables import WIDTH, duration_text, render


def progress(**changes: object) -> Progress:
    """12 of 40 points finished in 28 s (3 failed) on 2 workers, with a long description of the last point."""
    state = Progress(total=50, to_run=40, already_done=10, finished=12, failed=3, started_at=time.monotonic() - 28,
                     last="n_odours=12, rule=full_with_transmitter_term, replicate=3: stable",
                     worker_count=lambda: 2, store=Path("results/odour.zarr"))
    for name, value in changes.items():
        setattr(state, name, value)
    return state


@pytest.mark.parametrize("width", [30, 40, 60, 80, 100, 160])
def test_the_live_line_fits_the_width_and_leaves_fields_out_whole(width: int) -> None:
    """At 80 columns the old bar cut its numbers to '16...' and 'ETA 0...'. [common practice: a terminal line
    longer than the terminal wraps onto the next line]"""
    line = status_line(progress(), width)
    assert len(line) <= width
    assert "12/40 points" in line
    fields = re.split(r"\s{2,}", line)
    whole = {"12/40 points", "3 failed", "2 workers", progress().last} | {f for f in fields if f.startswith("ETA ")}
    for field in fields:
        assert field in whole or set(field) <= {"#", "-"} or field.endswith(" elapsed"), field
    eta = next((f for f in fields if f.startswith("ETA ")), "ETA 1 min 05 s")
    assert eta in ("ETA 1 min 05 s", "ETA 1 min 06 s")  # 28 s / 12 points x 28 points left = 65.3 s


def test_an_open_count_search_gives_no_eta_from_the_laid_out_grid() -> None:
    """A searched sweep of 3200 laid-out points said 'ETA 10 h 13 min' after 12 points (5 December 2026) although
    its searches run a few dozen: while searches are open the total is an upper bound and the time left unknown."""
    searching = progress(to_run=3200, finished=12, searches_open=5)
    line = status_line(searching, 160)
    assert "12 of at most 3200 points" in line and "5 count searches open" in line
    assert "ETA" not in line and "#" not in line
    closed = status_line(progress(to_run=3200, unneeded=3160, finished=12, searches_open=0), 160)
    assert "12/40 points" in closed
    assert "ETA 1 min 05 s" in closed or "ETA 1 min 06 s" in closed  # as in the first test: the grid is known again


def test_a_log_gets_a_plain_line_every_few_seconds_with_the_counts_and_the_compile_notice() -> None:
    """Output to a file used to show nothing between the start line and the end. A fake clock: one point
    finishes every second for 16 s, the first 4 s compile a build."""
    now = [0.0]
    stream = io.StringIO()
    lines = PlainLines(stream, clock=lambda: now[0])
    state = progress(finished=0, failed=0, to_run=16, compiling={"abc": 40.0})
    for second in range(17):
        now[0] = float(second)
        state.finished = second
        if second == 4:
            state.compiling = {}
        lines.update(state)
    lines.tick(final=True)
    written = stream.getvalue().splitlines()
    assert len(written) >= 3
    assert len(written) <= 1 + 16 / EVERY_S + 1
    assert "compiling network (first time, ~40 s)" in written[0]
    assert all(re.search(r"\b\d+/16 points, 0 failed, ETA ", line) for line in written)
    assert written[-1].split("] ", 1)[1].startswith("16/16 points")


def test_the_closing_lines_name_the_workers_the_store_and_the_next_command() -> None:
    """The closing line said 'workers 0' and never named the store or what to run next."""
    lines = run_summary(progress(finished=40, failed=0), Path("odour.toml"))
    assert " on 2 workers " in lines[0]
    assert lines[-1] == "store: results/odour.zarr; next: capsweep capacity results/odour.zarr"


def test_a_rerun_after_failed_points_says_how_many_failed_and_how_to_retry() -> None:
    """A plain rerun after failures printed 'ran 0 of 0 points ... 2 were already stored' and exit 0."""
    lines = run_summary(progress(to_run=0, finished=0, failed=0, already_done=50, failed_before=2),
                        Path("odour.toml"))
    assert lines[0] == "nothing to run: 48 of 50 points were already stored"
    assert "2 points failed in an earlier run" in lines[1] and "capsweep run odour.toml --retry-failed" in lines[1]
    assert lines[-1].endswith("next: capsweep status results/odour.zarr --failed (2 failed points)")


def test_a_table_column_has_one_number_format_and_the_table_fits_its_width() -> None:
    """3 / 2.97 / 3.1 Hz in one column, 0.0616 beside 0.439, always-zero columns and 180-230 character tables."""
    frame = pd.DataFrame({"n_odours": [1, 2, 3], "rate_hz": [3.0, 2.97, 3.1], "score": [0.0616, 0.439, 0.5],
                          "failed": [0, 0, 0], **{f"metric_{k}": [1.25, 2.5, 3.75] for k in range(12)},
                          "wall_time_s": [785000.0, 12.34, 75.0]})
    shown = render(frame, keep=["n_odours"], hide_zero=["failed"], durations=["wall_time_s"])
    rows = shown.text.splitlines()
    assert max(map(len, rows)) <= WIDTH
    assert [row.split()[1] for row in rows[1:]] == ["3.00", "2.97", "3.10"]
    assert [row.split()[2] for row in rows[1:]] == ["0.062", "0.439", "0.500"]
    assert "failed" not in rows[0] and shown.all_zero == ["failed"] and shown.too_wide
    wide = render(frame, keep=["n_odours"], hide_zero=["failed"], durations=["wall_time_s"], wide=True)
    assert "failed" in wide.text.splitlines()[0] and "218 h 03 min" in wide.text


@pytest.mark.parametrize(("seconds", "text"), [(0.42, "0.4 s"), (59.94, "59.9 s"), (185, "3 min 05 s"),
                                               (785000, "218 h 03 min")])
def test_durations_read_in_hours_minutes_and_seconds(seconds: float, text: str) -> None:
    """785000 s = 218 h 3 min 20 s [derived: 785000 = 218 x 3600 + 3 x 60 + 20]."""
    assert duration_text(seconds) == text


def test_csv_writes_the_float_a_person_means() -> None:
    """0.9999999999999999 (1 - 2**-53, a rounding residue) was written as is; 15 significant digits show 1 while
    keeping every digit a float64 holds reliably [IEEE 754: float64 carries 15.95 decimal digits]."""
    text = table_csv(pd.DataFrame({"fraction": [1 - 2**-53, 0.123456789012345]}), {})
    assert text.splitlines()[1:] == ["1", "0.123456789012345"]


def test_a_compile_announced_on_a_worker_reaches_the_progress_while_it_lasts() -> None:
    """The bar sat at '0/N ETA -:--:--' for 30 s during the first compile. The notice travels through Dask's
    event log (a real in-process cluster): open while the build compiles, gone once it is done."""
    from distributed import Client

    from capsweep.runners.notices import COMPILE_TOPIC, announce
    from capsweep.sweeps.dispatch import QUIET_HTTP_ADDRESS
    from capsweep.sweeps.launch import _compile_notice

    state = progress(compiling={})
    seen: list[dict[str, float]] = []
    with Client(processes=False, n_workers=1, threads_per_worker=1, dashboard_address=None,
                scheduler_kwargs={"dashboard_address": QUIET_HTTP_ADDRESS}) as client:
        client.subscribe_topic(COMPILE_TOPIC, lambda event: (_compile_notice(state, event[1]),
                                                             seen.append(dict(state.compiling))))
        client.submit(announce, COMPILE_TOPIC, {"build": "k1", "expected_s": 42.0, "finished": False}).result()
        deadline = time.monotonic() + 30
        while not seen and time.monotonic() < deadline:
            time.sleep(0.05)
        assert state.compiling == {"k1": 42.0}
        assert "compiling network (first time, ~42 s)" in status_line(state, 200)
        client.submit(announce, COMPILE_TOPIC, {"build": "k1", "expected_s": 0.0, "finished": True}, pure=False).result()
        while len(seen) < 2 and time.monotonic() < deadline:
            time.sleep(0.05)
    assert state.compiling == {}
    announce(COMPILE_TOPIC, {"build": "k2", "expected_s": 1.0, "finished": False})  # outside a worker: nothing happens
