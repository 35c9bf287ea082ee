"""How ``capsweep run`` shows its progress: one live line on a terminal, plain lines in a log.

Both render a :class:`capsweep.sweeps.launch.Progress`. On a terminal, :class:`LiveLine` redraws one line
that fits the terminal's width: fields are left out whole, lowest priority first, and no number is ever
cut. When stderr is a file or a pipe (a batch job, ``nohup``), :class:`PlainLines` writes a full line at
most every :data:`EVERY_S` seconds while points finish (every :data:`QUIET_S` seconds while none does),
each with points done of total, failures and the time left. A standalone build's first compile is named
in both while it lasts. While a searched count axis has open searches, the total is only an upper bound (the
laid-out grid) and the time left is unknown: the line says "at most" and how many searches are open instead.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import IO, Any

from rich.console import Console
from rich.live import Live
from rich.text import Text

from .tables import duration_text

EVERY_S = 5.0
"""Shortest time between two plain progress lines while points finish (s)."""
QUIET_S = 30.0
"""Time between plain progress lines while no point finishes (a long compile, long points) (s)."""
BAR_MIN = 10
"""Narrowest progress bar worth drawing (characters)."""


def eta_s(progress: Any) -> float | None:
    """Seconds left, from the time per point so far (None before the first point finished, or while count searches
    are open: how many points they will still run is not known)."""
    left = progress.planned - progress.finished
    if progress.finished == 0 or progress.searches_open:
        return None
    return progress.elapsed_s / progress.finished * max(left, 0)


def compile_notice(progress: Any) -> str:
    """'compiling network (first time, ~40 s)' while a standalone build's first compile lasts, else ''."""
    compiling = dict(progress.compiling)  # filled from the client's event-loop thread
    if not compiling:
        return ""
    expected = max(compiling.values())
    return f"compiling network (first time, ~{expected:.0f} s)"


def fields(progress: Any) -> list[tuple[str, int]]:
    """The progress fields as (text, priority) in display order; lower priority goes first when space is short."""
    total = progress.planned
    eta = eta_s(progress)
    notice = compile_notice(progress)
    searching = progress.searches_open
    done = f"{progress.finished} of at most {total}" if searching else f"{progress.finished}/{total}"
    return [
        (f"{done} points", 0),
        (f"{progress.failed} failed", 1),
        (f"ETA {duration_text(eta)}" if eta is not None else
         f"{searching} count searches open" if searching else "ETA ?", 2),
        (f"{duration_text(progress.elapsed_s)} elapsed", 4),
        (f"{progress.worker_count()} workers", 5),
        (notice, 3) if notice else ("", 9),
        (progress.last, 6) if progress.last else ("", 9),
    ]


def status_line(progress: Any, width: int) -> str:
    """One line of at most ``width`` characters: whole fields only (the least important left out first) and a bar
    in the room that is left."""
    shown = [(text, rank) for text, rank in fields(progress) if text]
    while shown and _joined_width(shown) > width:
        shown.remove(max(shown, key=lambda item: item[1]))
    room = width - _joined_width(shown) - 2
    total = progress.planned
    if room >= BAR_MIN and shown and not progress.searches_open:
        bar = _bar(progress.finished, total, min(room, 40))
        shown.insert(1, (bar, 0))
    return "  ".join(text for text, _ in shown)


def _joined_width(items: list[tuple[str, int]]) -> int:
    return sum(len(text) for text, _ in items) + 2 * max(len(items) - 1, 0)


def _bar(done: int, total: int, width: int) -> str:
    filled = int(width * done / total) if total else width
    return "#" * filled + "-" * (width - filled)


def plain_line(progress: Any) -> str:
    """One log line: every field, with the time since start first."""
    return f"[{duration_text(progress.elapsed_s)}] " + ", ".join(text for text, _ in fields(progress) if text)


class PlainLines:
    """Progress as plain lines on ``stream``, written at most every EVERY_S s (QUIET_S s while nothing finishes)."""

    def __init__(self, stream: IO[str], clock: Callable[[], float] = time.monotonic) -> None:
        self.stream, self.clock = stream, clock
        self.progress: Any = None
        self.written_at: float | None = None
        self.written: tuple[Any, ...] = ()
        self.lock = threading.Lock()

    def update(self, progress: Any) -> None:
        """Take a new state; write a line if one is due."""
        self.progress = progress
        self.tick()

    def tick(self, final: bool = False) -> None:
        """Write a line if one is due (``final``: if anything changed since the last one)."""
        with self.lock:
            progress = self.progress
            if progress is None:
                return
            state = (progress.finished, progress.failed, tuple(dict(progress.compiling)))
            now = self.clock()
            since = None if self.written_at is None else now - self.written_at
            changed = state != self.written
            due = since is None or (changed and since >= EVERY_S) or since >= QUIET_S or (final and changed)
            if due:
                self.stream.write(plain_line(progress) + "\n")
                self.stream.flush()
                self.written_at, self.written = now, state


class LiveLine:
    """Progress as one line that a terminal redraws, fitted to its width at every refresh."""

    def __init__(self, console: Console) -> None:
        self.console = console
        self.progress: Any = None
        self.live = Live(self, console=console, refresh_per_second=2, transient=False)

    def __rich__(self) -> Text:
        if self.progress is None:
            return Text("")
        return Text(status_line(self.progress, self.console.width - 1), no_wrap=True, overflow="crop")

    def update(self, progress: Any) -> None:
        """Take a new state (the line is redrawn at the next refresh)."""
        self.progress = progress


class ProgressView:
    """Shows a run's progress on ``console`` (stderr): a live line on a terminal, plain lines otherwise.

    A ticker thread keeps the plain lines going while no event arrives (a compile, a long point).
    """

    def __init__(self, console: Console) -> None:
        self.console = console
        self.started = False
        self.dashboard_shown = False
        self.live = LiveLine(console) if console.is_terminal else None
        self.plain = None if console.is_terminal else PlainLines(console.file)
        self.stop = threading.Event()
        self.ticker = threading.Thread(target=self._tick, name="capsweep-progress", daemon=True)

    def __enter__(self) -> ProgressView:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        if self.live is not None and self.live.live.is_started:
            self.live.live.stop()
        elif self.plain is not None and self.ticker.is_alive():
            self.plain.tick(final=True)

    def _tick(self) -> None:
        while not self.stop.wait(1.0):
            if self.plain is not None:
                self.plain.tick()

    def update(self, progress: Any) -> None:
        """Show ``progress`` (a launch.Progress)."""
        if not self.started:
            self.console.print(f"{progress.total} points: {progress.already_done} stored before, "
                               f"{progress.to_run} to run", highlight=False, markup=False)
            self.started = True
            if not progress.to_run:
                return
            if self.live is not None:
                self.live.live.start()
            else:
                self.ticker.start()
        if progress.dashboard and not self.dashboard_shown:
            self.console.print(f"Dask dashboard: {progress.dashboard}", highlight=False, markup=False)
            self.dashboard_shown = True
        if self.live is not None:
            self.live.update(progress)
        elif self.plain is not None:
            self.plain.update(progress)
