"""Large networks: capsweep's standalone point against a minimal cpp_standalone script of the same network.

    python benchmarks/bench_large.py [--sizes 4000,8000] [--repeats 3] [--minimal-s 5]

For each size, the minimal script is the point's network as ``capsweep.runners.model.build_network``
makes it for the runtime engines (same neurons, synapses, plasticity, prewired weights and
``PoissonInput`` background drive), with the stimulus sources and spike monitors removed, built
once with Brian2's cpp_standalone device and no capsweep machinery (no watch, no stimulus, no
run arguments, no snapshots, no reading of results). Its binary then reruns ``--repeats`` times.

capsweep's point runs through ``capsweep.sweeps.workload.probe`` with its build cached: the slope of
time against simulated time over two runs of different lengths (what a sweep pays per simulated
second, reading and scoring included), in wall time and in CPU time of the worker and its binary.
The minimal script's cost is its binary's time over its simulated time (its start-up included,
which favours neither side much). Each repeat runs both, alternating which goes first, in fresh
processes, so that the load of other users of the machine falls on both alike; CPU time is not
inflated by that load, wall time is.

Printed per size: min / median / max over repeats of the CPU and wall seconds per simulated
second of each and their ratios, the CPU seconds of the binaries' simulation loops alone
(Brian2's ``last_run_info``) and their ratio, and peak resident memory of the whole capsweep point
(Python worker + binary) and of the minimal binary.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from bench_scaling import read_peak_mib, run_child, size_config, timed_command

MINIMAL_REMOVED = ("stim_sources", "stim_synapses", "spikes_exc", "spikes_inh")
"""Objects of the runtime network that the minimal script leaves out."""


def build_minimal(n_exc: int, duration_s: float, directory: Path) -> float:
    """Generate and compile the minimal script of ``n_exc`` E cells for ``duration_s`` simulated seconds; compile s."""
    import brian2 as b2

    from capsweep.runners.builds import compiled_form
    from capsweep.runners.model import build_network

    b2.set_device("cpp_standalone", build_on_run=False, directory=str(directory))
    b2.prefs.devices.cpp_standalone.openmp_threads = 0
    cfg = compiled_form(size_config(n_exc, "indegree"))  # every plasticity term compiled in, as capsweep does
    network, namespace, _ = build_network(cfg, seed=1)
    removed = [network[name] for name in MINIMAL_REMOVED if name in network]
    network.remove(*removed)  # still referenced below: the device created their arrays already
    b2.seed(1)
    network.run(duration_s * b2.second, namespace=namespace)
    start = time.perf_counter()
    b2.get_device().build(directory=str(directory), compile=True, run=False, with_output=False)
    del removed
    return time.perf_counter() - start


def run_minimal(directory: Path, duration_s: float) -> dict[str, float]:
    """Run the compiled minimal binary once: wall, CPU and loop CPU seconds per simulated second, peak MiB."""
    peak_file = directory / "peak_kib"
    peak_file.unlink(missing_ok=True)
    cpu, start = children_cpu(), time.perf_counter()
    subprocess.run(timed_command(["./main"], peak_file), cwd=directory, check=True, stdout=subprocess.DEVNULL)
    wall, cpu = time.perf_counter() - start, children_cpu() - cpu
    loop_cpu = float((directory / "results" / "last_run_info.txt").read_text().split()[0])
    return {"per_sim_s": wall / duration_s, "cpu_per_sim_s": cpu / duration_s,
            "loop_cpu_per_sim_s": loop_cpu / duration_s, "binary_mib": read_peak_mib(peak_file)}


def children_cpu() -> float:
    """CPU seconds (user + system) of this process's finished children."""
    t = os.times()
    return t.children_user + t.children_system


def compare(n_exc: int, repeats: int, minimal_s: float) -> list[dict[str, Any]]:
    """``repeats`` interleaved measurements of capsweep and the minimal script at ``n_exc`` E cells."""
    rows = []
    with tempfile.TemporaryDirectory(prefix="capsweep-large-") as work:
        build_dir, minimal_dir = str(Path(work) / "builds"), Path(work) / "minimal"
        compile_minimal = build_minimal_in_child(n_exc, minimal_s, minimal_dir)
        compile_capsweep = run_child("compile", n_exc, "standalone", "indegree", build_dir)["first_point_s"]
        for repeat in range(repeats):
            order = ("capsweep", "minimal") if repeat % 2 == 0 else ("minimal", "capsweep")
            row: dict[str, Any] = {"n_exc": n_exc, "repeat": repeat, "compile_minimal_s": compile_minimal,
                                   "first_point_capsweep_s": compile_capsweep}
            for who in order:
                if who == "capsweep":
                    row["capsweep"] = run_child("probe", n_exc, "standalone", "indegree", build_dir)
                else:
                    row["minimal"] = run_minimal(minimal_dir, minimal_s)
            rows.append(row)
    return rows


def build_minimal_in_child(n_exc: int, duration_s: float, directory: Path) -> float:
    """:func:`build_minimal` in a fresh process (Brian2's device state stays out of this one)."""
    code = ("import sys; sys.path.insert(0, sys.argv[4]); from bench_large import build_minimal;"
            " from pathlib import Path; print(build_minimal(int(sys.argv[1]), float(sys.argv[2]), Path(sys.argv[3])))")
    proc = subprocess.run([sys.executable, "-c", code, str(n_exc), str(duration_s), str(directory),
                           str(Path(__file__).parent)], capture_output=True, text=True, check=True)
    return float(proc.stdout.strip().splitlines()[-1])


def spread(values: list[float], fmt: str) -> str:
    """min / median / max of ``values``."""
    return " / ".join(format(v, fmt) for v in (min(values), statistics.median(values), max(values)))


COLUMNS = ("cpu_per_sim_s", "per_sim_s", "loop_cpu_per_sim_s")
"""Costs compared, each in s per simulated second: CPU of the whole point, wall, CPU of the simulation loop."""


def summary(rows: list[dict[str, Any]]) -> str:
    """One Markdown line per size: each cost of capsweep, of the minimal script and their ratio; peak memory."""
    fields = [str(rows[0]["n_exc"])]
    for column in COLUMNS:
        ours, bare = [r["capsweep"][column] for r in rows], [r["minimal"][column] for r in rows]
        fields += [spread(ours, ".2f"), spread(bare, ".2f"), spread([a / b for a, b in zip(ours, bare)], ".2f")]
    fields += [spread([r["capsweep"]["python_mib"] + r["capsweep"]["binary_mib"] for r in rows], ".0f"),
              spread([r["minimal"]["binary_mib"] for r in rows], ".0f")]
    return "| " + " | ".join(fields) + " |"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="4000,8000")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--minimal-s", type=float, default=5.0, help="simulated seconds of the minimal script")
    args = parser.parse_args()
    print(f"measured {time.strftime('%Y-%m-%d')} on {os.cpu_count()} cores; min / median / max of {args.repeats}")
    heads = [f"{who} {what}" for what in ("CPU s / s sim", "wall s / s sim", "loop CPU s / s sim")
             for who in ("capsweep", "minimal", "ratio")]
    table = ["| N_E | " + " | ".join(heads) + " | capsweep point peak MiB (python + binary) | minimal peak MiB |",
             "|---" * (len(heads) + 3) + "|"]
    for n_exc in (int(s) for s in args.sizes.split(",")):
        rows = compare(n_exc, args.repeats, args.minimal_s)
        for row in rows:
            print(json.dumps(row), flush=True)
        table.append(summary(rows))
    print("\n".join(table))


if __name__ == "__main__":
    main()
