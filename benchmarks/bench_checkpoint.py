"""Cost of within-point checkpoints on the standalone engine: a long hold with and without them.

The point: registry defaults at N_E = 800 (fixed in-degree, one odour assembly of 40 cells, no
early abort) with a long hold. Its build is compiled once (not timed); then, in rounds that
alternate the two, fresh processes run the point without checkpoints and with
``execution.checkpoint_interval_s`` (each checkpoint holds the whole state, the spikes recorded so
far included, and is synced to disk). Reported: wall and binary CPU seconds per simulated second
(whole point, one run each), the ratio with / without per round,
and whether both give bitwise the same result.

    python benchmarks/bench_checkpoint.py [--n-exc 800] [--hold-s 600] [--interval-s 60] [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

from bench_threads import result_hash, run_child, size_config, spread, timed_point


def child(n_exc: int, hold_s: float, interval_s: float) -> dict[str, Any]:
    """One run of the point (checkpoints every ``interval_s``, 0 = off): cost per simulated second, result hash."""
    from capsweep.runners.checkpoints import checkpoint_root

    cfg = size_config(n_exc, 1, hold_s, **{"execution.checkpoint_interval_s": interval_s})
    load = os.getloadavg()[0]
    wall, cpu, result = timed_point(cfg)
    simulated = float(result["simulated_time_s"])
    return {"wall": wall / simulated, "cpu": cpu / simulated, "hash": result_hash(result),
            "load": (load + os.getloadavg()[0]) / 2, "left": [p.name for p in checkpoint_root().glob("*")]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n-exc", type=int, default=800)
    parser.add_argument("--hold-s", type=float, default=600.0)
    parser.add_argument("--interval-s", type=float, default=60.0)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        import json

        n_exc, hold_s, interval_s = args.child
        print(json.dumps(child(int(n_exc), float(hold_s), float(interval_s))), flush=True)
        return
    from capsweep.runners.checkpoints import CHECKPOINT_DIR_ENV

    runs: dict[float, list[dict[str, Any]]] = {0.0: [], args.interval_s: []}
    with tempfile.TemporaryDirectory(prefix="capsweep-bench-ck-") as scratch:
        build_dir, checkpoints = str(Path(scratch) / "builds"), {CHECKPOINT_DIR_ENV: str(Path(scratch) / "ck")}
        run_child([str(args.n_exc), "1", "0"], build_dir, checkpoints)  # compile (a 1 s hold, not timed)
        for _ in range(args.repeats):
            for interval in runs:
                runs[interval].append(run_child([str(args.n_exc), str(args.hold_s), str(interval)], build_dir,
                                                checkpoints))
    off, on = runs[0.0], runs[args.interval_s]
    print(f"measured {time.strftime('%Y-%m-%d')} on {os.cpu_count()} cores, N_E = {args.n_exc}, hold "
          f"{args.hold_s:g} s, {args.repeats} rounds alternating")
    print("| checkpoints | wall s / s simulated | CPU s / s simulated | load (1 min) |")
    print("|---|---|---|---|")
    for interval, label in ((0.0, "off"), (args.interval_s, f"every {args.interval_s:g} s")):
        rows = runs[interval]
        print(f"| {label} | {spread([r['wall'] for r in rows])} | {spread([r['cpu'] for r in rows])} | "
              f"{spread([r['load'] for r in rows])} |")
    print(f"wall ratio with / without, per round: {spread([a['wall'] / b['wall'] for a, b in zip(on, off)])}; "
          f"CPU ratio: {spread([a['cpu'] / b['cpu'] for a, b in zip(on, off)])}; median CPU overhead "
          f"{100 * (statistics.median(a['cpu'] / b['cpu'] for a, b in zip(on, off)) - 1):+.1f} %")
    print("bitwise equal results:", len({r["hash"] for r in off + on}) == 1,
          "; checkpoint files left:", sorted({name for r in on for name in r["left"]}) or "none")


if __name__ == "__main__":
    main()
