"""What the end-to-end tests share: the tiny network's sweep-file tables and a call of the real CLI."""

from __future__ import annotations

import subprocess
import sys


def tiny_network(hold_s: float = 3.0, size: int = 60, adapt_jump: float = 0.0) -> str:
    """Sweep-file tables of the tests' tiny network: 300 E cells, prewired assemblies, settle 1 s, hold ``hold_s``;
    ``adapt_jump`` 0.1 makes it the demo's network (configs/demo.toml), whose recall is cue-evoked."""
    return f"""
[network]
n_exc = 300
adapt_jump = {adapt_jump}
[assemblies]
size = {size}
[plasticity.triplet]
a_ltp = 0.03
b_ltd = 0.006
[protocol]
settle_s = 1.0
hold_s = {hold_s}
"""


def capsweep(*args: str, timeout: float = 900) -> subprocess.CompletedProcess[str]:
    """Run the installed CLI in a fresh process."""
    return subprocess.run([sys.executable, "-m", "capsweep.sweeps.cli", *args], capture_output=True, text=True,
                          timeout=timeout)
