"""capsweep: sweeps of plastic spiking-network memory models, answered with capacity figures.

A sweep file (TOML) expands into points; each point is a Brian2 simulation whose plasticity
never switches off, run as a Dask task; every result lands in one labelled Zarr store, from
which the capacity of each configuration is derived. The public API below is imported lazily,
so ``import capsweep`` stays cheap (Dask worker processes import it on start).

Layers, bottom up (an import never runs upward):

- ``capsweep.errors``, ``capsweep.registry``, ``capsweep.engines``, ``capsweep.flags``: foundations;
- ``capsweep.results_schema``: the store; ``capsweep.runners``: the simulation side;
- ``capsweep.sweeps``: sweep files, launch, queries, plots and the command line.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

__version__ = "0.2.0"

_API = {
    "run_sweep": "capsweep.sweeps.launch",
    "RunOptions": "capsweep.sweeps.launch",
    "load_sweep": "capsweep.sweeps.sweepfile",
    "open_dataset": "capsweep.results_schema.dataset",
    "capacity_table": "capsweep.sweeps.capacity",
    "prescreen_sweep": "capsweep.sweeps.prescreen",
}
__all__ = ["__version__", "RunOptions", "capacity_table", "load_sweep", "open_dataset", "prescreen_sweep", "run_sweep"]

if TYPE_CHECKING:
    from .results_schema.dataset import open_dataset
    from .sweeps.capacity import capacity_table
    from .sweeps.launch import RunOptions, run_sweep
    from .sweeps.prescreen import prescreen_sweep
    from .sweeps.sweepfile import load_sweep


def __getattr__(name: str) -> Any:
    """Import a public API name on first use."""
    if name in _API:
        return getattr(import_module(_API[name]), name)
    raise AttributeError(f"module 'capsweep' has no attribute {name!r}")
