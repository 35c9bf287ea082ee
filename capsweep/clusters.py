"""The cluster kinds: one table that defines where a sweep's Dask workers run, read by every place that names one.

A kind is worker processes on this machine, a Dask scheduler someone else runs, or a batch system
whose worker jobs dask-jobqueue submits. For a batch system the table says which dask-jobqueue class
runs it and how that class takes the ``[execution.cluster]`` settings: its keywords for the queue and
the account, the format of its wall-time clock, and job settings that copy another one (htcondor asks
for disk as well as memory). The registry's choices, the command line's help and the client side of
:mod:`capsweep.sweeps.dispatch` read from here. Nothing here imports Dask.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import ConfigError

HMS = "hms"
"""Wall-time clock HH:MM:SS."""
HM = "hm"
"""Wall-time clock HH:MM, rounded up to whole minutes."""


@dataclass(frozen=True)
class ClusterKind:
    """One value of ``execution.cluster.kind``: where the workers run and, for a batch system, how to ask for jobs."""

    name: str
    summary: str
    jobqueue: str = ""
    """Class name of the kind's cluster in dask_jobqueue; '' for a kind that submits no batch jobs."""
    queue: str | None = None
    """Its keyword for ``execution.cluster.queue``; None: the system has no queues."""
    account: str | None = None
    """Its keyword for ``execution.cluster.account``; None: the system has no accounts."""
    clock: str = ""
    """Format of the job's wall time: :data:`HMS`, :data:`HM`, or '' (the system takes none)."""
    copies: tuple[tuple[str, str], ...] = ()
    """(setting, setting whose value it takes): job settings the system needs beyond the common ones."""

    @property
    def batch(self) -> bool:
        """Whether the kind submits worker jobs to a batch system (through dask-jobqueue)."""
        return bool(self.jobqueue)

    def walltime(self, minutes: float) -> str | None:
        """``minutes`` in the kind's clock format; None when the system takes no wall time."""
        if not self.clock:
            return None
        if self.clock == HM:
            hours, mins = divmod(math.ceil(minutes), 60)
            return f"{hours:02d}:{mins:02d}"
        hours, rest = divmod(round(minutes * 60), 3600)
        return f"{hours:02d}:{rest // 60:02d}:{rest % 60:02d}"


LOCAL = "local"
"""Worker processes on this machine (``execution.workers``)."""
SCHEDULER = "scheduler"
"""A running Dask scheduler (``execution.scheduler``)."""

KINDS: dict[str, ClusterKind] = {
    kind.name: kind
    for kind in (
        ClusterKind(LOCAL, "worker processes on this machine (execution.workers)"),
        ClusterKind(SCHEDULER, "the workers of a running Dask scheduler (execution.scheduler)"),
        # Batch systems: dask-jobqueue's class and keywords per system [common practice].
        ClusterKind("slurm", "SLURM batch jobs", "SLURMCluster", "queue", "account", HMS),
        ClusterKind("pbs", "PBS batch jobs", "PBSCluster", "queue", "account", HMS),
        ClusterKind("sge", "Grid Engine batch jobs", "SGECluster", "queue", "project", HMS),
        ClusterKind("lsf", "LSF batch jobs", "LSFCluster", "queue", "project", HM),
        ClusterKind("htcondor", "HTCondor batch jobs (disk requested as large as memory)", "HTCondorCluster",
                    copies=(("disk", "memory"),)),
    )
}
"""Every cluster kind by name, in the order the registry lists them."""

NAMES: tuple[str, ...] = tuple(KINDS)


def cluster_kind(name: str) -> ClusterKind:
    """The kind called ``name``; ConfigError naming the allowed ones otherwise."""
    if name not in KINDS:
        raise ConfigError(f"execution.cluster.kind = {name!r} is not allowed: expected one of {', '.join(NAMES)}")
    return KINDS[name]
