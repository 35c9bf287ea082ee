"""The ``capsweep`` console script's entry point, cheap to import on purpose.

Dask starts its local worker processes with multiprocessing's spawn method, and a spawned
process first imports its parent's main module: for the console script, the module that holds
its entry point. Pointing the script here instead of at :mod:`capsweep.sweeps.cli` (typer, rich and the
key registry: 0.1-0.3 s of imports) keeps that cost off every worker's start.
"""

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


ignore_interrupts_if_spawned()


def main() -> None:
    """Run the command line (see :func:`capsweep.sweeps.cli.main`)."""
    from .cli import main as run_command_line

    run_command_line()
