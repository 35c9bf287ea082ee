"""Notices a running point sends to the process that follows the sweep, through Dask's event log.

A point runs on a Dask worker; the client (``capsweep run``) subscribes to :data:`COMPILE_TOPIC`
(:meth:`distributed.Client.subscribe_topic`) and shows the notice while it lasts. Outside a Dask worker
(``capsweep replay``, the estimate's probes) :func:`announce` does nothing.
"""

from __future__ import annotations

from typing import Any

COMPILE_TOPIC = "capsweep-compile"
"""Topic of the standalone engine's first compile of a build: ``{"build": key, "expected_s": s, "finished": bool}``."""


def announce(topic: str, message: dict[str, Any]) -> None:
    """Log ``message`` (msgpack-serialisable) under ``topic`` on this process's Dask worker, if it is one."""
    try:
        from distributed import get_worker

        worker = get_worker()
    except (ImportError, ValueError):  # not running as a Dask task
        return
    worker.log_event(topic, message)
