"""Calibration design of the prescreen's link: simulate a quasi-random design, fit the link, print its constants.

The prescreen's theory quantities (:func:`capsweep.runners.theory.link.features`) are mapped to a runaway
probability by a logistic link whose coefficients are the one thing fitted to simulations. They are fitted
here, on a scrambled Sobol design (scipy.stats.qmc; Owen 1998, J. Complexity 14:466) over the box
:data:`BOX` around the demo network (the link's ``CALIBRATION_BOX`` and two switches of rule terms), never on
the region sweeps used to validate the prescreen::

    python benchmarks/calibrate_prescreen.py simulate --points 512 --out /tmp/calibration.json
    python benchmarks/calibrate_prescreen.py fit /tmp/calibration.json

``simulate`` runs every design point once (real Brian2 simulations on a local Dask cluster) and writes the
design with the simulated outcomes; ``fit`` computes the features, fits the link by maximum likelihood and
prints the constants to paste into ``runners/theory/link.py``, with the in-sample and cross-validated
agreement.
"""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path
from typing import Any

import numpy as np
from scipy.stats import qmc

from capsweep.flags import RUNAWAY
from capsweep.registry import defaults, nest, resolve_derived
from capsweep.runners.theory.link import CALIBRATION_BOX, LTD_PER_LTP

BOX: dict[str, tuple[float, float]] = {**CALIBRATION_BOX, "full_rule": (0.0, 1.0), "inhibitory_on": (0.0, 1.0)}
"""Design box: the range of each design variable (uniform in the stated units); the last two pick the rule terms."""
SIZES = (200, 300, 400)
"""Network sizes of the design (each one compiled binary)."""
SEED = 20261204


def design_point(u: np.ndarray) -> dict[str, Any]:
    """Flat config overrides of one design point from a point ``u`` of the unit cube (order of BOX)."""
    x = {name: float(lo + ui * (hi - lo)) for (name, (lo, hi)), ui in zip(BOX.items(), u)}
    n = SIZES[min(int(u[0] * len(SIZES)), len(SIZES) - 1)]
    size = int(round(x["size_fraction"] * n))
    count = min(int(x["count"]), n // size)
    a_ltp = 10 ** x["log10_a_ltp"]
    full, inhibitory = bool(x["full_rule"] < 0.5), bool(x["inhibitory_on"] < 0.7)
    return {
        "network.n_exc": n, "assemblies.size": size, "assemblies.count": count,
        "assemblies.prewire_gain": round(x["prewire_gain"], 3),
        "plasticity.heterosynaptic.enabled": full, "plasticity.transmitter.enabled": full,
        "plasticity.heterosynaptic.beta": round(10 ** x["log10_beta"], 5),
        "plasticity.triplet.a_ltp": round(a_ltp, 6), "plasticity.triplet.b_ltd": round(a_ltp * LTD_PER_LTP, 6),
        "plasticity.inhibitory.enabled": inhibitory,
        "plasticity.inhibitory.eta": float(f"{10 ** x['log10_eta']:.3g}"),
        "plasticity.inhibitory.w_max": round(x["inhibitory_cap_ratio"] * defaults()["network.w_i_to_e"], 4),
        "protocol.settle_s": 1.0, "protocol.hold_s": round(x["hold_s"], 2),
    }


def config_of(overrides: dict[str, Any]) -> dict[str, Any]:
    """Nested, resolved config of a design point."""
    return nest(resolve_derived({**defaults(), **overrides}))


def simulate_one(overrides: dict[str, Any], seed: int) -> dict[str, Any]:
    """Worker-side: simulate one design point; its outcome and recalled count."""
    from capsweep.runners.point import run_point

    result = run_point(config_of(overrides), seed)
    return {"overrides": overrides, "seed": seed, "outcome": str(result["outcome"]),
            "recalled_count": int(result["recalled_count"])}


def simulate(points: int, out: Path, workers: int) -> None:
    from dask.distributed import as_completed

    from capsweep.sweeps.dispatch import dask_client

    unit = qmc.Sobol(len(BOX), scramble=True, seed=SEED).random(points)
    design = [design_point(u) for u in unit]
    start, rows = time.perf_counter(), []
    with dask_client(workers, None) as client:
        futures = [client.submit(simulate_one, d, SEED + i, pure=False) for i, d in enumerate(design)]
        for i, future in enumerate(as_completed(futures)):
            rows.append(future.result())
            if (i + 1) % 32 == 0:
                print(f"{i + 1}/{points} simulated, {time.perf_counter() - start:.0f} s")
    out.write_text(json.dumps({"seed": SEED, "box": BOX, "rows": rows}, indent=1))
    print(f"wrote {out}: {points} points in {time.perf_counter() - start:.0f} s")


def fit(path: Path, workers: int, folds: int = 8) -> None:
    from concurrent.futures import ProcessPoolExecutor

    from capsweep.runners.theory.link import FEATURES, RUNAWAY_AT, SIGNS, features, fit_logistic, runaway_probability

    rows = json.loads(path.read_text())["rows"]
    with ProcessPoolExecutor(workers) as pool:
        x = np.array(list(pool.map(features, [config_of(r["overrides"]) for r in rows], chunksize=8)))
    y = np.array([r["outcome"] == RUNAWAY for r in rows], dtype=float)
    signs = np.array([SIGNS[name] for name in FEATURES])
    coef = fit_logistic(x, y, signs)
    p = runaway_probability(x, coef)
    order = np.random.default_rng(SEED).permutation(len(y))
    held = np.empty(len(y))
    for k in range(folds):
        test = order[k::folds]
        train = np.setdiff1d(order, test)
        held[test] = runaway_probability(x[test], fit_logistic(x[train], y[train], signs))
    print(f"{len(y)} points, runaway in {int(y.sum())}; agreement in sample {np.mean((p >= RUNAWAY_AT) == y):.1%}, "
          f"{folds}-fold cross-validated {np.mean((held >= RUNAWAY_AT) == y):.1%}")
    print("INTERCEPT =", repr(round(float(coef[0]), 4)))
    print("WEIGHTS = {" + ", ".join(f'"{n}": {round(float(c), 4)!r}' for n, c in zip(FEATURES, coef[1:])) + "}")
    spread = x.std(axis=0)
    print("standardised weights:", {n: round(float(c * s), 2) for n, c, s in zip(FEATURES, coef[1:], spread)})
    if not math.isfinite(float(coef.sum())):
        raise SystemExit("fit diverged")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="stage", required=True)
    s = sub.add_parser("simulate")
    s.add_argument("--points", type=int, default=512)
    s.add_argument("--out", type=Path, default=Path("/tmp/calibration.json"))
    s.add_argument("--workers", type=int, default=2)
    f = sub.add_parser("fit")
    f.add_argument("design", type=Path)
    f.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    if args.stage == "simulate":
        simulate(args.points, args.out, args.workers)
    else:
        fit(args.design, args.workers)


if __name__ == "__main__":
    main()
