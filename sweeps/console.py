"""The ``capsweep`` console script's entry point, cheap to import on purpose.

Dask starts its local worker processes with multiprocessing's spawn method, and a spawned
process first imports its parent's main module: for the console script, the module that holds
its entry point. Pointing the script here instead of at :mod:`capsweep.sweeps.cli` (typer, rich and the
key registry: 0.1-0.3 s of imports) keeps that cost off every worker's start.
"""

from __future__ import annotations

from ..interrupts import ignore_interrupts_if_spawned

ignore_interrupts_if_spawned()


def main() -> None:
    """Run the command line (see :func:`capsweep.sweeps.cli.main`)."""
    from .cli import main as run_command_line

    run_command_line()
