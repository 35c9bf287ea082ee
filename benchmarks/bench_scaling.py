"""Scaling table: wall time per simulated second and peak memory of one worker, per network size and engine.

Each (engine, N_E) cell runs in a fresh process (so peak RSS is that of one worker doing one
point): the two-length probe of ``capsweep.sweeps.plan`` splits the per-point overhead from the cost per
simulated second. Prints a Markdown table for the README.

    python benchmarks/bench_scaling.py [--sizes 500,1000,2000,4000] [--engines cython,standalone]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys

CHILD = """
import json, resource, sys
from capsweep.sweeps.plan import probe
from capsweep.registry import defaults, nest
n_exc, engine = int(sys.argv[1]), sys.argv[2]
flat = defaults()
flat.update({"network.n_exc": n_exc, "assemblies.count": 2, "assemblies.size": max(20, n_exc // 10)})
cost = probe(nest(flat), engine)
peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({"per_sim_s": cost.per_sim_s, "overhead_s": cost.overhead_s, "peak_mib": peak_mib}))
"""


def measure(n_exc: int, engine: str) -> dict[str, float]:
    """Probe one network size with one engine in a fresh process."""
    proc = subprocess.run([sys.executable, "-c", CHILD, str(n_exc), engine], capture_output=True, text=True,
                          check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="500,1000,2000,4000")
    parser.add_argument("--engines", default="cython,standalone")
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    engines = args.engines.split(",")
    print("| N_E | " + " | ".join(f"{e}: s wall / s simulated | {e}: peak MiB" for e in engines) + " |")
    print("|---" * (1 + 2 * len(engines)) + "|")
    for n_exc in sizes:
        cells = []
        for engine in engines:
            row = measure(n_exc, engine)
            cells += [f"{row['per_sim_s']:.2f}", f"{row['peak_mib']:.0f}"]
        print(f"| {n_exc} | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()
