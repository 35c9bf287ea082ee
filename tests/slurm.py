"""Bring up a one-node SLURM on this machine for the cluster tests (and ``.ci/run``), or say why not.

The node is this host, both controller and only compute node: ``proctrack/linuxproc``, ``task/none``,
no cgroups, ``select/cons_tres`` with cores as the consumable (memory requests are checked against the
node's size but not reserved). Needs root and Debian's ``slurm-wlm`` and ``munge`` packages, which it
installs with apt-get when missing. A ``/etc/slurm/slurm.conf`` that this helper did not write is never
touched (the machine then belongs to a real cluster, which the tests leave alone).

As a script: ``python tests/slurm.py`` prints ``ready`` or ``skipped: <reason>`` and exits 0 either way.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

CONF = Path("/etc/slurm/slurm.conf")
MARK = "# written by capsweep's tests/slurm.py: a one-node SLURM for its cluster tests"
INSTALL_TIMEOUT_S = 300.0
"""Longest wait (s) for apt-get to fetch and install the packages (only when missing)."""
START_TIMEOUT_S = 120.0
"""Longest wait (s) for the daemons and an idle node, once the packages are there."""
_RUN_DIRS = ("/var/spool/slurmctld", "/var/spool/slurmd", "/var/log/slurm")


def start_slurm(timeout_s: float = START_TIMEOUT_S) -> str:
    """Start (or find running) a one-node SLURM whose node is idle; '' when ready, else why not (a skip reason)."""
    if _node_idle():
        return ""
    if os.geteuid() != 0:
        return "a one-node SLURM needs root to install and start (not root here)"
    if CONF.exists() and MARK not in CONF.read_text():
        return f"{CONF} exists and was not written by tests/slurm.py; not touching a real cluster's configuration"
    missing = _install(time.monotonic() + INSTALL_TIMEOUT_S)
    if missing:
        return missing
    deadline = time.monotonic() + timeout_s
    _write_conf()
    for name in _RUN_DIRS:
        Path(name).mkdir(parents=True, exist_ok=True)
    problem = _start_munge() or _start_daemons()
    if problem:
        return problem
    while time.monotonic() < deadline:
        if _node_idle():
            return ""
        time.sleep(1.0)
    return f"the SLURM node did not become idle within {timeout_s:.0f} s (see /var/log/slurm/)"


def _install(deadline: float) -> str:
    """apt-get the packages if a daemon is missing; '' when installed, else why not."""
    if all(shutil.which(tool) for tool in ("slurmctld", "slurmd", "munged", "sinfo")):
        return ""
    if not shutil.which("apt-get"):
        return "slurm-wlm and munge are not installed and there is no apt-get to install them"
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    for command in (["apt-get", "update", "-qq"], ["apt-get", "install", "-y", "-qq", "slurm-wlm", "munge"]):
        try:
            done = subprocess.run(command, env=env, capture_output=True, text=True, stdin=subprocess.DEVNULL,
                                  timeout=max(deadline - time.monotonic(), 1.0))
        except subprocess.TimeoutExpired:
            return f"{' '.join(command)} did not finish in time"
        if done.returncode != 0:
            last = (done.stderr.strip().splitlines() or ["no message"])[-1]
            return f"{' '.join(command)} failed: {last}"
    return ""


def _write_conf() -> None:
    """slurm.conf naming this host as controller and only node, with its cores and memory."""
    host = subprocess.run(["hostname", "-s"], capture_output=True, text=True, check=True).stdout.strip()
    memory_mb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2**20
    CONF.write_text(f"""{MARK}
ClusterName=capsweep-test
SlurmctldHost={host}
SlurmUser=root
AuthType=auth/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerType=sched/backfill
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
MpiDefault=none
ReturnToService=2
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
NodeName={host} CPUs={os.cpu_count() or 1} RealMemory={memory_mb * 9 // 10} State=UNKNOWN
PartitionName=capsweep Nodes={host} Default=YES MaxTime=INFINITE State=UP
""")


def _start_munge() -> str:
    """Start munged as the munge user unless it answers already; '' when it does."""
    if _munge_answers():
        return ""
    Path("/run/munge").mkdir(exist_ok=True)
    shutil.chown("/run/munge", "munge", "munge")
    subprocess.run(["runuser", "-u", "munge", "--", "munged"], capture_output=True, timeout=30)
    for _ in range(20):
        if _munge_answers():
            return ""
        time.sleep(0.5)
    return "munged did not start (try: runuser -u munge -- munged -F)"


def _munge_answers() -> bool:
    encoded = subprocess.run(["munge", "-n"], capture_output=True, timeout=10)
    return encoded.returncode == 0 and subprocess.run(["unmunge"], input=encoded.stdout, capture_output=True,
                                                      timeout=10).returncode == 0


def _start_daemons() -> str:
    """Start slurmctld and slurmd unless running; '' when both run."""
    for daemon in ("slurmctld", "slurmd"):
        if subprocess.run(["pgrep", "-x", daemon], capture_output=True).returncode == 0:
            continue
        started = subprocess.run([daemon], capture_output=True, text=True, timeout=30)
        if started.returncode != 0:
            return f"{daemon} did not start: {started.stderr.strip() or started.stdout.strip()}"
    return ""


def _node_idle() -> bool:
    """True if sinfo answers and shows an idle node (the controller is up and the node registered)."""
    if not shutil.which("sinfo"):
        return False
    try:
        shown = subprocess.run(["sinfo", "-h", "-o", "%t"], capture_output=True, text=True, timeout=10)
    except subprocess.TimeoutExpired:
        return False
    return shown.returncode == 0 and "idle" in shown.stdout.split()


if __name__ == "__main__":
    reason = start_slurm()
    print(f"skipped: {reason}" if reason else "ready")
    sys.exit(0)
