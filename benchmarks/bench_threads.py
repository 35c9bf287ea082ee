"""OpenMP threads per point (``execution.threads``) on the standalone engine: cost and reproducibility.

For each network size (registry defaults, fixed in-degree, one odour assembly of 5 % of the cells,
no early abort) and thread count, a fresh process first compiles the build (not timed); then, in
rounds that interleave the thread counts, a fresh process runs the point at two hold lengths with
the build cached. Cost per simulated second is the slope between the two (the per-point overhead of
building the network in Python and reading results drops out), in wall time and in CPU time of
the binary (all its threads: ``RUSAGE_CHILDREN``). Each run's result (every stored value but the
timings) is hashed: repeats of one thread count must give one hash, and the counts are compared
with each other. The load average of the machine is printed beside every measurement.

    python benchmarks/bench_threads.py [--sizes 8000,16000] [--threads 1,2] [--repeats 3] [--holds 1,11]
                                       [--wait-policy PASSIVE] [--build-dir DIR]

``--build-dir`` keeps the builds in DIR (reused by a later run) instead of a temporary directory.
Every run is also printed to stderr as it finishes.

``--wait-policy`` sets ``OMP_WAIT_POLICY`` for the binaries (unset by default: libgomp spins a
while at each barrier, then sleeps).
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from typing import Any

HOLDS_S = (1.0, 11.0)
"""The two hold lengths (s) whose difference in cost gives the cost per simulated second (``--holds``). With 0.5 and
2.5 s the 2 s between them cost about as much as the run-to-run jitter of a point's set-up (code regeneration in a
fresh process, 2-3 s), and an idle machine gave slopes from -0.17 to 0.79 wall s per simulated s for one point."""


def size_config(n_exc: int, threads: int, hold_s: float, **changes: Any) -> dict[str, Any]:
    """Registry defaults at ``n_exc`` E cells: one odour assembly of 5 % of the cells, standalone, no early abort."""
    from capsweep.registry import defaults, nest

    flat = defaults()
    flat.update({"network.n_exc": n_exc, "assemblies.count": 1, "assemblies.size": n_exc // 20,
                 "protocol.hold_s": hold_s, "execution.engine": "standalone", "execution.abort_on_runaway": False,
                 "execution.threads": threads, **changes})
    return nest(flat)


def result_hash(result: dict[str, Any]) -> str:
    """Hash of every stored value of a point's result except the timings and the thread count itself."""
    from capsweep.results_schema.layout import TIMINGS

    digest = hashlib.sha256()
    for name in sorted(result):
        if name not in (*TIMINGS, "threads"):
            digest.update(name.encode() + repr(result[name]).encode())
    return digest.hexdigest()[:16]


def children_cpu() -> float:
    """CPU seconds (user + system) of this process's finished children: the binaries it ran."""
    t = os.times()
    return t.children_user + t.children_system


def timed_point(cfg: dict) -> tuple[float, float, dict[str, Any]]:
    """Wall and binary CPU seconds of one run of ``cfg`` (seed 1), and its result."""
    from capsweep.runners.point import run_point

    wall, cpu = time.perf_counter(), children_cpu()
    result = run_point(cfg, 1)
    return time.perf_counter() - wall, children_cpu() - cpu, result


def slope(config_at: Callable[[float], dict], holds_s: tuple[float, float]) -> dict[str, Any]:
    """Cost per simulated second (wall, binary CPU) from runs at the two ``holds_s``; hash of the longer run."""
    from capsweep.runners.protocol import total_duration_s

    load = os.getloadavg()[0]
    short, long = (config_at(hold) for hold in holds_s)
    wall_short, cpu_short, _ = timed_point(short)
    wall_long, cpu_long, result = timed_point(long)
    span = total_duration_s(long) - total_duration_s(short)
    return {"wall": (wall_long - wall_short) / span, "cpu": (cpu_long - cpu_short) / span,
            "hash": result_hash(result), "load": (load + os.getloadavg()[0]) / 2}


def child(kind: str, n_exc: int, threads: int, holds_s: tuple[float, float]) -> dict[str, Any]:
    """``compile``: build (untimed); ``measure``: :func:`slope` with the build cached."""
    if kind == "compile":
        from capsweep.runners.point import run_point

        run_point(size_config(n_exc, threads, 0.0, **{"protocol.settle_s": 0.3}), 1)
        return {}
    return slope(lambda hold: size_config(n_exc, threads, hold), holds_s)


def run_child(args: list[str], build_dir: str, env: dict[str, str] | None = None, holds: str = "") -> dict[str, Any]:
    """Run the calling script's ``--child`` with ``args`` (and ``--holds`` when given) in a fresh process on the build
    cache ``build_dir``.

    Returns the JSON object the child printed last.
    """
    from capsweep.runners.builds import BUILD_DIR_ENV

    given = ["--holds", holds] if holds else []
    proc = subprocess.run([sys.executable, sys.argv[0], *given, "--child", *args], capture_output=True, text=True,
                          check=True, env={**os.environ, **(env or {}), BUILD_DIR_ENV: build_dir})
    return dict(json.loads(proc.stdout.strip().splitlines()[-1]))


def spread(values: list[float]) -> str:
    """``min / median / max`` of ``values``, two decimals."""
    return f"{min(values):.2f} / {statistics.median(values):.2f} / {max(values):.2f}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--sizes", default="8000,16000")
    parser.add_argument("--threads", default="1,2")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--wait-policy", default="")
    parser.add_argument("--build-dir", default="")
    parser.add_argument("--holds", default=",".join(f"{h:g}" for h in HOLDS_S),
                        help="the two hold lengths (s) whose difference gives the cost per simulated second")
    parser.add_argument("--child", nargs=3, metavar=("KIND", "N_E", "THREADS"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    short, long = (float(h) for h in args.holds.split(","))
    holds = (short, long)
    if args.child:
        kind, n_exc, threads = args.child
        print(json.dumps(child(kind, int(n_exc), int(threads), holds)), flush=True)
        return
    sizes, counts = [int(s) for s in args.sizes.split(",")], [int(t) for t in args.threads.split(",")]
    env = {"OMP_WAIT_POLICY": args.wait_policy} if args.wait_policy else {}
    rows: dict[tuple[int, int], list[dict[str, Any]]] = {(n, t): [] for n in sizes for t in counts}
    with contextlib.ExitStack() as stack:
        build_dir = args.build_dir or stack.enter_context(tempfile.TemporaryDirectory(prefix="capsweep-bench-threads-"))
        for n_exc in sizes:
            for threads in counts:
                run_child(["compile", str(n_exc), str(threads)], build_dir)
        for _ in range(args.repeats):
            for n_exc in sizes:
                for threads in counts:
                    rows[n_exc, threads].append(run_child(["measure", str(n_exc), str(threads)], build_dir, env,
                                                          args.holds))
                    print(n_exc, threads, json.dumps(rows[n_exc, threads][-1]), file=sys.stderr, flush=True)
    print(f"measured {time.strftime('%Y-%m-%d')} on {os.cpu_count()} cores, {args.repeats} repeats interleaved, "
          f"holds {args.holds} s"
          + (f", OMP_WAIT_POLICY={args.wait_policy}" if args.wait_policy else ""))
    print("| N_E | threads | wall s / s simulated | CPU s / s simulated | load (1 min) | repeats bitwise equal |"
          " result = that of 1 thread |")
    print("|---" * 7 + "|")
    for (n_exc, threads), runs in rows.items():
        hashes = {run["hash"] for run in runs}
        single = {run["hash"] for run in rows.get((n_exc, 1), [])}
        print(f"| {n_exc} | {threads} | {spread([r['wall'] for r in runs])} | {spread([r['cpu'] for r in runs])} | "
              f"{spread([r['load'] for r in runs])} | {'yes' if len(hashes) == 1 else 'NO'} | "
              f"{'yes' if hashes == single else 'no'} |")


if __name__ == "__main__":
    main()
