"""Scaling table: wall time per simulated second, peak memory and compile time per network size and engine.

Each (engine, N_E, connectivity) combination runs in fresh processes against an empty build cache: one
process compiles the size's build (the compile time, standalone only), a second one measures with
the build cached, as every later point of a sweep sees it. The two-length probe of
``capsweep.sweeps.workload`` splits the per-point overhead from the cost per simulated second, once in
wall time and once in CPU time of the process and its children (the binary), which the load of
other users of the machine does not inflate. Peak memory is that of the whole point: the worker's
Python process plus the standalone binary it runs (GNU ``time``'s maximum resident set of the
binary; ``RUSAGE_CHILDREN`` would report the Python image that ``fork`` copies before ``exec``).
Prints a Markdown table for the README.

    python benchmarks/bench_scaling.py [--sizes 1000,2000,4000,8000,16000] [--engines standalone]
                                       [--connectivity indegree,probability]

Connectivity ``indegree`` keeps the registry's in-degrees (80 E, 20 I inputs per cell) at every
size; ``probability`` keeps the connection probability of the 4000-cell network (2 %), so the
in-degrees grow with the size and the synapse count with its square.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

REFERENCE_SIZE = 4000
"""N_E at which both connectivities give the registry's in-degrees."""


def size_config(n_exc: int, connectivity: str, engine: str = "standalone") -> dict[str, Any]:
    """Registry defaults at ``n_exc`` E cells: four odour assemblies of 5 % of the cells, no early abort."""
    from capsweep.registry import defaults, inhibitory_count, nest

    flat = defaults()
    flat.update({"network.n_exc": n_exc, "assemblies.count": 4, "assemblies.size": n_exc // 20,
                 "execution.engine": engine, "execution.abort_on_runaway": False})
    if connectivity == "probability":
        n_inh = inhibitory_count(n_exc, flat["network.inh_per_exc"])
        share = n_exc / REFERENCE_SIZE
        flat.update({"network.indegree_exc": round(flat["network.indegree_exc"] * share),
                     "network.indegree_inh": round(flat["network.indegree_inh"] * n_inh
                                                   / inhibitory_count(REFERENCE_SIZE, flat["network.inh_per_exc"]))})
    return nest(flat)


TIME = "/usr/bin/time"
"""GNU time: runs a program and writes its maximum resident set size (KiB) with ``-f %M``."""


def timed_command(command: list[str], peak_file: Path) -> list[str]:
    """``command`` run under GNU time, which appends the program's peak resident KiB to ``peak_file``."""
    return [TIME, "-a", "-f", "%M", "-o", str(peak_file), *command]


def read_peak_mib(peak_file: Path) -> float:
    """Largest peak (MiB) that :func:`timed_command` runs appended to ``peak_file``."""
    return max(float(line) for line in peak_file.read_text().split()) / 1024


def cpu_clock() -> float:
    """CPU seconds of this process and its finished children (user + system)."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def child_compile(n_exc: int, engine: str, connectivity: str) -> dict[str, Any]:
    """Compile (standalone) or warm up (runtime engines) the size's code with one short point; its wall time."""
    from capsweep.runners.point import run_point
    from capsweep.sweeps.workload import PROBE_HOLD_S, _probe_config

    start = time.perf_counter()
    run_point(_probe_config(size_config(n_exc, connectivity, engine), engine, PROBE_HOLD_S[0]), 1)
    return {"first_point_s": time.perf_counter() - start}


def child_probe(n_exc: int, engine: str, connectivity: str) -> dict[str, Any]:
    """The cost model of ``capsweep.sweeps.workload.probe`` in wall and CPU time, and peak memory, build cached."""
    import brian2

    from capsweep.sweeps.workload import probe

    peak_file = Path(tempfile.mkdtemp()) / "peak_kib"
    brian2.prefs.devices.cpp_standalone.run_cmd_unix = timed_command(["./main"], peak_file)
    cfg = size_config(n_exc, connectivity, engine)
    wall, cpu = probe(cfg, engine), probe(cfg, engine, clock=cpu_clock)
    out: dict[str, Any] = {"per_sim_s": wall.per_sim_s, "overhead_s": wall.overhead_s, "cpu_per_sim_s": cpu.per_sim_s,
                           "cpu_overhead_s": cpu.overhead_s,
                           "python_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                           "binary_mib": read_peak_mib(peak_file) if peak_file.exists() else 0.0}
    if engine == "standalone":

        from capsweep.runners.protocol import total_duration_s
        from capsweep.sweeps.workload import PROBE_HOLD_S, _probe_config

        long_run = _probe_config(size_config(n_exc, connectivity, engine), engine, PROBE_HOLD_S[1])
        out["loop_cpu_per_sim_s"] = brian2.get_device()._last_run_time / total_duration_s(long_run)
    return out


CHILDREN = {"compile": child_compile, "probe": child_probe}


def run_child(kind: str, n_exc: int, engine: str, connectivity: str, build_dir: str) -> dict[str, Any]:
    """Run one ``CHILDREN`` step in a fresh process with ``build_dir`` as the build cache; its JSON line."""
    from capsweep.runners.builds import BUILD_DIR_ENV

    proc = subprocess.run([sys.executable, __file__, "--child", kind, str(n_exc), engine, connectivity],
                          capture_output=True, text=True, check=True, env={**os.environ, BUILD_DIR_ENV: build_dir})
    return dict(json.loads(proc.stdout.strip().splitlines()[-1]))


def measure(n_exc: int, engine: str, connectivity: str) -> dict[str, Any]:
    """Compile time, cost per simulated second and peak memory of one size, from an empty build cache."""
    with tempfile.TemporaryDirectory(prefix="capsweep-bench-builds-") as build_dir:
        first = run_child("compile", n_exc, engine, connectivity, build_dir)
        return {**first, **run_child("probe", n_exc, engine, connectivity, build_dir)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="1000,2000,4000,8000,16000")
    parser.add_argument("--engines", default="standalone")
    parser.add_argument("--connectivity", default="indegree,probability")
    parser.add_argument("--child", nargs=4, metavar=("KIND", "N_E", "ENGINE", "CONNECTIVITY"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, n_exc, engine, connectivity = args.child
        print(json.dumps(CHILDREN[kind](int(n_exc), engine, connectivity)), flush=True)
        return
    print(f"measured {time.strftime('%Y-%m-%d')} on {os.cpu_count()} cores")
    print("| N_E | connectivity | engine | first point (compile) s | s wall / s simulated | s CPU / s simulated"
          " | binary loop CPU s / s simulated | overhead s (wall) | peak MiB: python + binary |")
    print("|---" * 9 + "|")
    measured: dict[tuple[str, int, str], float] = {}  # (engine, N_E, connectivity) -> CPU s per simulated s
    for connectivity in args.connectivity.split(","):
        for n_exc in (int(s) for s in args.sizes.split(",")):
            if connectivity == "probability" and n_exc <= REFERENCE_SIZE:
                continue  # the same network as with fixed in-degree
            for engine in args.engines.split(","):
                row = measure(n_exc, engine, connectivity)
                measured[engine, n_exc, connectivity] = row["cpu_per_sim_s"]
                loop = f"{row['loop_cpu_per_sim_s']:.2f}" if "loop_cpu_per_sim_s" in row else "-"
                print(f"| {n_exc} | {connectivity} | {engine} | {row['first_point_s']:.0f} | {row['per_sim_s']:.2f} | "
                      f"{row['cpu_per_sim_s']:.2f} | {loop} | {row['overhead_s']:.1f} | "
                      f"{row['python_mib']:.0f} + {row['binary_mib']:.0f} |", flush=True)
    print(estimate_errors(measured))


def estimate_errors(measured: dict[tuple[str, int, str], float]) -> str:
    """Markdown table: each size's CPU cost per simulated second scaled by cell count from the nearest other
    measured size of the same engine (as ``capsweep.sweeps.costs.CostModel.point_s`` scales), against the measured
    one."""
    from capsweep.runners.protocol import total_duration_s
    from capsweep.sweeps.costs import Cost, CostModel, Entry

    lines = ["| N_E | connectivity | engine | scaled from N_E | estimated s / s simulated | measured | error |",
             "|---" * 7 + "|"]
    for (engine, n_exc, connectivity), cost in measured.items():
        others = [key for key in measured if key[0] == engine and key[1] != n_exc]
        if not others:
            continue
        source = min(others, key=lambda key: (abs(key[1] - n_exc), key[2] != connectivity))
        config = size_config(n_exc, connectivity, engine)
        simulated = total_duration_s(config)
        model = CostModel({source[1]: Entry(Cost(0.0, measured[source]), "bench")})
        estimate = model.point_s(n_exc, simulated) / simulated
        lines.append(f"| {n_exc} | {connectivity} | {engine} | {source[1]} ({source[2]}) | {estimate:.2f} | "
                     f"{cost:.2f} | {100 * (estimate / cost - 1):+.0f} % |")
    return "\n".join(lines)


if __name__ == "__main__":
    main()
