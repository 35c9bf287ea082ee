"""Ctrl-C and SIGTERM: they stop the command quietly (the command closes its cluster), not its Dask workers."""

from __future__ import annotations

import multiprocessing
import signal


def ignore_interrupts_if_spawned() -> None:
    """In a process spawned by the command (a Dask worker of a local cluster, which imports the command's main
    module first), ignore SIGINT from its first import on: Ctrl-C in the terminal reaches every process of the
    foreground group, but it is for the command, which closes its cluster; a worker interrupted while it starts
    would print tracebacks."""
    if multiprocessing.parent_process() is not None:
        signal.signal(signal.SIGINT, signal.SIG_IGN)


def stop_on_terminate() -> None:
    """In the command's own process, let SIGTERM (a plain `kill`, or what a batch system sends before it kills a
    job) stop the command as Ctrl-C does, and restore Ctrl-C where the shell that started the command in the
    background left SIGINT ignored (POSIX: a non-interactive shell's background commands ignore it)."""
    if multiprocessing.parent_process() is not None:
        return
    signal.signal(signal.SIGINT, signal.default_int_handler)
    signal.signal(signal.SIGTERM, _as_interrupt)


def _as_interrupt(signum: int, frame: object) -> None:
    raise KeyboardInterrupt
