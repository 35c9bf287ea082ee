"""Ctrl-C in processes the command spawns: for the command, not for its Dask workers."""

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
