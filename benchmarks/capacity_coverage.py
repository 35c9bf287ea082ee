"""Coverage of the fitted capacity against synthetic success curves with known crossings, beside the old rule.

Each scenario is a true success curve P(c) with a known crossing c* (P(c*) = 0.5), a grid of
assembly counts and a number of replicates per count; each data set draws k ~ Binomial(n, P(c))
per count and is fitted with :func:`capsweep.sweeps.capacity_fit.fit_capacity`. Curves:

- ``logistic s``: logit P = -s ln(c / c*), s = 2, 5, 10 (the fitted model's family; s = 5 puts the
  old rule's mean at 5.2 for c* = 6, 3 replicates, grid 1..12: the case the old rule was measured on);
- ``weibull k``: P = exp(-ln 2 (c / c*)^k), k = 2, 6 (not logistic in ln c: asymmetric).

Crossings 2.6, 6 and 11.4 (near the bottom, inside, near the top of the grids); grids 1..12 and
2, 4, ..., 12; 3, 5, 10 and 20 replicates. Per data set: the new estimate's error (when the fit
says the crossing is inside the grid), whether its 95 % interval holds c* (an open end reaches
past the grid), its width within the grid (open ends at the grid edge), the non-monotone flag
(every curve here is monotone, so each flag is a false positive), and the old rule's value
("largest count k such that every count <= k reaches a success fraction >= 0.5"; 0 when the
smallest count falls short), its error, and whether the old table's range over per-replicate
capacities holds c* (:func:`old_range_covers`; the old rule's only interval).

``--compare-intervals`` adds, on the logistic 5 and weibull 6 curves at 3, 10 and 20 replicates
(grid 1..12), the coverage and median width of four interval methods: the Firth-penalized profile
likelihood, the plain-likelihood profile, the parametric-bootstrap percentile interval
(``BOOTSTRAP`` data sets drawn from the Firth fit, re-fitted) and the Firth profile widened to
hold the isotonic bracket (last passing to first failing count of the isotonic fit; the module's).

The non-monotone flag's power: a curve that is logistic 10 with crossing 9 except that success
collapses to 0.05 at counts 3 and 4 (grid 1..12).

``--designs`` compares, on the logistic 5 curve, a fixed grid 1..12 with 10 replicates per count
against two sequential designs (:mod:`capsweep.sweeps.sequential`, its default Wilson level 95 %,
2 replicates a round, cap 10): the grid 1..12 starting at 3 replicates with more where the
Wilson interval straddles 0.5, and the open-ended count search from 4 (ceiling 64, 3 replicates
per new count) with the same replicate rule; crossings 6 and 20 (the latter is past the fixed grid).

``--scaling`` runs the whole chain: per network size (300-4800 excitatory cells, 4 or 5 sizes) a
logistic 5 curve whose crossing is 3 (N / 300)^b, tallies on the grid 1..12, fitted capacities,
then :func:`capsweep.sweeps.scaling_fit.fit_scaling`; it reports the exponent and the coverage
of its 95 % interval (b = 0.5 pushes the largest sizes' crossings to 12 and beyond: censored).

Not collected by pytest. Run::

    python benchmarks/capacity_coverage.py [--datasets 100] [--workers 2] [--compare-intervals] [--designs] [--scaling]
"""

from __future__ import annotations

import argparse
import math
import time
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from capsweep.sweeps.capacity_fit import CapacityFit, _crossing_interval, _Curve, fit_capacity
from capsweep.sweeps.scaling_fit import fit_scaling
from capsweep.sweeps.sequential import Tally, next_count, replicates_to_add
from capsweep.sweeps.success import count_passes

Curve = Callable[[np.ndarray, float], np.ndarray]
THRESHOLD = 0.5
BOOTSTRAP = 200


def logistic(slope: float) -> Curve:
    """logit P = -slope ln(c / c*)."""
    return lambda counts, crossing: expit(-slope * np.log(counts / crossing))


def weibull(shape: float) -> Curve:
    """P = exp(-ln 2 (c / c*)^shape)."""
    return lambda counts, crossing: np.exp(-math.log(2) * (counts / crossing) ** shape)


SHAPES: dict[str, Curve] = {"logistic 2": logistic(2), "logistic 5": logistic(5), "logistic 10": logistic(10),
                            "weibull 2": weibull(2), "weibull 6": weibull(6)}
GRIDS = {"1..12": tuple(range(1, 13)), "2,4..12": tuple(range(2, 13, 2))}
CROSSINGS = (2.6, 6.0, 11.4)
REPLICATES = (3, 5, 10, 20)


@dataclass(frozen=True)
class Scenario:
    shape: str
    crossing: float
    grid: str
    replicates: int


def draw_replicates(rng: np.random.Generator, shape: str, crossing: float, counts: Iterable[int],
                    replicates: int) -> np.ndarray:
    """One synthetic data set, per point: success (bool) of ``replicates`` Bernoulli draws per count at the
    true P, shape (count, replicate)."""
    p = SHAPES[shape](np.asarray(tuple(counts), float), crossing)
    return rng.random((len(p), replicates)) < p[:, None]


def tallies_of(wins: np.ndarray, counts: Iterable[int]) -> dict[int, Tally]:
    """Per count: successes of the replicates in ``wins`` (shape (count, replicate))."""
    return {int(c): Tally(int(row.sum()), len(row)) for c, row in zip(counts, wins)}


def draw(rng: np.random.Generator, shape: str, crossing: float, counts: Iterable[int],
         replicates: int) -> dict[int, Tally]:
    """One synthetic data set as per-count tallies (:func:`draw_replicates`)."""
    counts = tuple(counts)
    return tallies_of(draw_replicates(rng, shape, crossing, counts, replicates), counts)


def old_range_covers(wins: np.ndarray, counts: tuple[int, ...], truth: float) -> bool:
    """Whether the old table's replicate range holds ``truth``, read generously: from the smallest per-replicate
    capacity (largest count before the replicate's first failure; 0 if none) to the grid count just above the
    largest (where that replicate failed; open at the top of the grid)."""
    leads = [int(np.argmin(np.append(column, False))) for column in wins.T]  # first failure per replicate
    low = min(counts[lead - 1] if lead else 0 for lead in leads)
    top = max(leads)
    return low <= truth and (top == len(counts) or truth <= counts[top])


def old_rule(tallies: dict[int, Tally]) -> int:
    """Largest count k such that every count <= k reaches a success fraction >= 0.5 (0 if the smallest fails)."""
    capacity = 0
    for count in sorted(tallies):
        if tallies[count].successes < THRESHOLD * tallies[count].decided:
            break
        capacity = count
    return capacity


def covers(fit: CapacityFit, truth: float) -> bool:
    """Whether the interval holds ``truth`` (an open end reaches past the grid)."""
    return (fit.low is None or fit.low <= truth) and (fit.high is None or truth <= fit.high)


def width(fit: CapacityFit) -> float:
    """Interval width in assemblies within the grid (open ends at the grid edge)."""
    return (fit.high or fit.counts[-1]) - (fit.low or fit.counts[0])


def run_scenario(args: tuple[Scenario, int, int]) -> list[dict]:
    """Fit ``datasets`` data sets of one scenario; one row of measures per data set."""
    scenario, datasets, seed = args
    rng = np.random.default_rng(seed)
    rows = []
    counts = GRIDS[scenario.grid]
    for _ in range(datasets):
        wins = draw_replicates(rng, scenario.shape, scenario.crossing, counts, scenario.replicates)
        tallies = tallies_of(wins, counts)
        fit = fit_capacity(tallies, THRESHOLD)
        assert fit is not None
        rows.append({"scenario": scenario, "inside": fit.censoring == "inside",
                     "error": (fit.estimate - scenario.crossing) if fit.estimate is not None else math.nan,
                     "covered": covers(fit, scenario.crossing), "width": width(fit), "flag": fit.non_monotone,
                     "old_error": old_rule(tallies) - scenario.crossing,
                     "old_covered": old_range_covers(wins, counts, scenario.crossing)})
    return rows


def summary(rows: list[dict]) -> list[str]:
    """Markdown cells: data sets, inside %, median and mean error, coverage, median width, old rule, flags."""
    errors = np.array([r["error"] for r in rows if r["inside"]])
    old = np.array([r["old_error"] for r in rows])
    share = lambda key: 100 * np.mean([r[key] for r in rows])
    return [f"{len(rows)}", f"{share('inside'):.0f} %", f"{np.median(errors):+.2f}", f"{np.mean(errors):+.2f}",
            f"{share('covered'):.1f} %", f"{np.median([r['width'] for r in rows]):.2f}",
            f"{np.median(old):+.2f}", f"{np.mean(old):+.2f}", f"{share('old_covered'):.1f} %",
            f"{share('flag'):.1f} %"]


COLUMNS = ("data sets", "crossing inside", "median error", "mean error", "95 % interval coverage", "median width",
           "old rule median error", "old rule mean error", "old replicate range coverage", "non-monotone flags")


def table(rows: list[dict], key: Callable[[Scenario], tuple[str, ...]], titles: tuple[str, ...]) -> str:
    """A markdown table of ``summary`` per group of scenarios (``key`` gives a group's first cells)."""
    groups: dict[tuple[str, ...], list[dict]] = {}
    for row in rows:
        groups.setdefault(key(row["scenario"]), []).append(row)
    lines = ["| " + " | ".join(titles + COLUMNS) + " |", "|" + "---|" * (len(titles) + len(COLUMNS))]
    lines += ["| " + " | ".join([*name, *summary(group)]) + " |" for name, group in groups.items()]
    lines.append("| " + " | ".join(["all"] + [""] * (len(titles) - 1) + summary(rows)) + " |")
    return "\n".join(lines)


def _flag_rate(args: tuple[int, int, int]) -> float:
    """Share of data sets flagged non-monotone on the dip curve (logistic 10, crossing 9, P = 0.05 at 3 and 4)."""
    replicates, datasets, seed = args
    rng = np.random.default_rng(seed)
    counts = np.array(GRIDS["1..12"])
    p = SHAPES["logistic 10"](counts.astype(float), 9.0)
    p[2:4] = 0.05
    flags = []
    for _ in range(datasets):
        fit = fit_capacity({int(c): Tally(int(k), replicates) for c, k in zip(counts, rng.binomial(replicates, p))})
        flags.append(fit is not None and fit.non_monotone)
    return float(np.mean(flags))


def flag_power(datasets: int, seed: int, pool: ProcessPoolExecutor) -> str:
    """One markdown row: the flag's detection rate on the dip curve per number of replicates."""
    rates = pool.map(_flag_rate, [(n, datasets, seed + n) for n in REPLICATES])
    return ("| replicates | " + " | ".join(map(str, REPLICATES)) + " |\n|" + "---|" * (len(REPLICATES) + 1)
            + "\n| non-monotone flag on the dip curve | " + " | ".join(f"{100 * r:.0f} %" for r in rates) + " |")


METHODS = ("Firth profile", "plain profile", "bootstrap", "Firth profile + isotonic bracket (the module's)")


def _interval_methods(args: tuple[Scenario, int, int]) -> list[dict]:
    """Per data set and interval method (``METHODS``): (covers the crossing, width in assemblies within the grid)."""
    scenario, datasets, seed = args
    rng = np.random.default_rng(seed)
    counts = np.array(GRIDS[scenario.grid], float)
    x = np.log(counts)
    rows = []
    for _ in range(datasets):
        tallies = draw(rng, scenario.shape, scenario.crossing, counts.astype(int), scenario.replicates)
        k, n = np.array([t.successes for t in tallies.values()], float), np.array([t.decided for t in tallies.values()])
        fit = fit_capacity(tallies, THRESHOLD)
        assert fit is not None
        ends = {METHODS[-1]: (fit.low, fit.high)}
        for method, firth in (("Firth profile", True), ("plain profile", False)):
            _, low, high, _ = _crossing_interval(_Curve(x, k, n, 0.0, firth), 0.95)
            ends[method] = (None if low is None else math.exp(low), None if high is None else math.exp(high))
        b0, b1 = _Curve(x, k, n, 0.0).fit()
        thetas = []
        for draws in rng.binomial(n.astype(int), expit(b0 + b1 * x), size=(BOOTSTRAP, len(counts))):
            c0, c1 = _Curve(x, draws.astype(float), n, 0.0).fit()
            thetas.append(-c0 / c1 if c1 < 0 else (math.inf if c0 >= 0 else -math.inf))
        low_b, high_b = np.exp(np.percentile(np.clip(thetas, -50, 50), [2.5, 97.5]))  # infinite: past the grid
        ends["bootstrap"] = (None if low_b <= counts[0] else low_b, None if high_b >= counts[-1] else high_b)
        row: dict = {"scenario": scenario}
        for method, (lo, hi) in ends.items():
            row[method] = ((lo is None or lo <= scenario.crossing) and (hi is None or scenario.crossing <= hi),
                           (hi or counts[-1]) - (lo or counts[0]))
        rows.append(row)
    return rows


def compare_intervals(datasets: int, seed: int, pool: ProcessPoolExecutor) -> str:
    """Markdown table: coverage and median width (assemblies, within the grid) of each interval method."""
    scenarios = [Scenario(shape, crossing, "1..12", n) for shape in ("logistic 5", "weibull 6")
                 for crossing in CROSSINGS for n in (3, 10, 20)]
    results = list(pool.map(_interval_methods, [(s, datasets, seed + i) for i, s in enumerate(scenarios)]))

    def cells(rows: list[dict]) -> str:
        return " | ".join(f"{100 * np.mean([r[m][0] for r in rows]):.0f} % / {np.median([r[m][1] for r in rows]):.2f}"
                          for m in METHODS)

    lines = ["| curve | crossing | replicates | data sets | " + " | ".join(METHODS) + " |", "|" + "---|" * 8]
    for s, rows in zip(scenarios, results):
        lines.append(f"| {s.shape} | {s.crossing:g} | {s.replicates} | {len(rows)} | {cells(rows)} |")
    everything = [r for rows in results for r in rows]
    lines.append(f"| all | | | {len(everything)} | {cells(everything)} |")
    return "\n".join(lines)


def _run_count(tallies: dict[int, Tally], rng: np.random.Generator, crossing: float, count: int, more: int) -> None:
    """Add ``more`` replicates of ``count`` (logistic 5 curve) to ``tallies``."""
    old = tallies.get(count, Tally(0, 0))
    wins = int(rng.binomial(more, float(SHAPES["logistic 5"](np.array([float(count)]), crossing)[0])))
    tallies[count] = Tally(old.successes + wins, old.decided + more)


def _passes(tallies: dict[int, Tally]) -> dict[int, bool]:
    """Per count run: whether it passes (the capacity rule's count verdict)."""
    return {count: bool(count_passes(t.successes, t.decided, THRESHOLD)) for count, t in tallies.items()}


def _fill_replicates(tallies: dict[int, Tally], rng: np.random.Generator, crossing: float) -> None:
    """Rounds of ``replicates_to_add`` until every count is decided or at its cap."""
    while wanted := replicates_to_add(tallies, THRESHOLD):
        for count, more in wanted.items():
            _run_count(tallies, rng, crossing, count, more)


def design(name: str, crossing: float, rng: np.random.Generator) -> dict[int, Tally]:
    """Tallies one design collects for one synthetic condition."""
    tallies: dict[int, Tally] = {}
    if name == "fixed 1..12 x 10":
        for count in range(1, 13):
            _run_count(tallies, rng, crossing, count, 10)
    elif name == "1..12, 3 + where undecided":
        for count in range(1, 13):
            _run_count(tallies, rng, crossing, count, 3)
        _fill_replicates(tallies, rng, crossing)
    else:
        while (count := next_count(_passes(tallies), start=4, ceiling=64)) is not None:
            _run_count(tallies, rng, crossing, count, 3)
            _fill_replicates(tallies, rng, crossing)
    return tallies


DESIGNS = ("fixed 1..12 x 10", "1..12, 3 + where undecided", "open search from 4, 3 + where undecided")


def _design_rows(args: tuple[str, float, int, int]) -> list[dict]:
    name, crossing, datasets, seed = args
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(datasets):
        tallies = design(name, crossing, rng)
        fit = fit_capacity(tallies, THRESHOLD)
        assert fit is not None
        rows.append({"replicates": fit.replicates, "counts": len(fit.counts), "inside": fit.censoring == "inside",
                     "error": math.log(fit.estimate / crossing) if fit.estimate else math.nan,
                     "covered": covers(fit, crossing), "width": width(fit)})
    return rows


def compare_designs(datasets: int, seed: int, pool: ProcessPoolExecutor) -> str:
    """Markdown table: replicates spent and accuracy of the fixed and sequential designs."""
    jobs = [(name, crossing, datasets, seed + i) for i, (name, crossing) in
            enumerate((n, c) for c in (6.0, 20.0) for n in DESIGNS)]
    lines = ["| design | crossing | data sets | replicates spent (mean) | counts run (mean) | crossing inside "
             "| RMS error of ln estimate | 95 % interval coverage | median width |", "|" + "---|" * 9]
    for (name, crossing, _, _), rows in zip(jobs, pool.map(_design_rows, jobs)):
        errors = np.array([r["error"] for r in rows if r["inside"]])
        rms = f"{np.sqrt(np.mean(errors ** 2)):.3f}" if len(errors) else "-"
        lines.append(f"| {name} | {crossing:g} | {len(rows)} | {np.mean([r['replicates'] for r in rows]):.1f} | "
                     f"{np.mean([r['counts'] for r in rows]):.1f} | {100 * np.mean([r['inside'] for r in rows]):.0f} % "
                     f"| {rms} | {100 * np.mean([r['covered'] for r in rows]):.1f} % "
                     f"| {np.median([r['width'] for r in rows]):.2f} |")
    return "\n".join(lines)


SCALING_SIZES = (300.0, 600.0, 1200.0, 2400.0, 4800.0)


def _scaling_rows(args: tuple[float, int, int, int, int]) -> list[dict]:
    """Whole chain per data set: tallies per size -> fitted capacities -> fitted exponent (logistic 5 curves)."""
    exponent, sizes, replicates, datasets, seed = args
    rng = np.random.default_rng(seed)
    prefactor = 3.0 / SCALING_SIZES[0] ** exponent  # capacity 3 at the smallest size
    rows = []
    for _ in range(datasets):
        fits = []
        for size in SCALING_SIZES[:sizes]:
            tallies = draw(rng, "logistic 5", prefactor * size ** exponent, GRIDS["1..12"], replicates)
            fit = fit_capacity(tallies, THRESHOLD)
            assert fit is not None
            fits.append((size, fit))
        scaling = fit_scaling(fits)
        rows.append({"fitted": scaling is not None, "censored": sum(f.censoring != "inside" for _, f in fits),
                     "exponent": scaling.exponent if scaling else math.nan,
                     "covered": bool(scaling and scaling.exponent_low <= exponent <= scaling.exponent_high),
                     "width": scaling.exponent_high - scaling.exponent_low if scaling else math.nan,
                     "caveat": bool(scaling and scaling.caveats)})
    return rows


def compare_scaling(datasets: int, seed: int, pool: ProcessPoolExecutor) -> str:
    """Markdown table: the exponent's estimate and the coverage of its interval through the whole chain."""
    jobs = [(b, sizes, n, datasets, seed + i) for i, (b, sizes, n) in
            enumerate((b, sizes, n) for b in (0.0, 0.5) for sizes in (4, 5) for n in (3, 10))]
    lines = ["| true b | sizes | replicates | data sets | fitted | censored capacities (mean) | median b | "
             "95 % interval coverage | median width | with caveats |", "|" + "---|" * 10]
    for (b, sizes, n, _, _), rows in zip(jobs, pool.map(_scaling_rows, jobs)):
        fitted = [r for r in rows if r["fitted"]]
        cells = [f"{b:g}", str(sizes), str(n), str(len(rows)), f"{100 * len(fitted) / len(rows):.0f} %",
                 f"{np.mean([r['censored'] for r in rows]):.2f}", f"{np.median([r['exponent'] for r in fitted]):+.3f}",
                 f"{100 * np.mean([r['covered'] for r in fitted]):.1f} %",
                 f"{np.median([r['width'] for r in fitted]):.2f}",
                 f"{100 * np.mean([r['caveat'] for r in fitted]):.0f} %"]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--datasets", type=int, default=100, help="synthetic data sets per scenario")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--compare-intervals", action="store_true")
    parser.add_argument("--designs", action="store_true")
    parser.add_argument("--scaling", action="store_true")
    args = parser.parse_args()
    scenarios = [Scenario(shape, crossing, grid, n) for shape in SHAPES for crossing in CROSSINGS
                 for grid in GRIDS for n in REPLICATES]
    start = time.perf_counter()
    with ProcessPoolExecutor(args.workers) as pool:
        jobs = [(s, args.datasets, args.seed + i) for i, s in enumerate(scenarios)]
        rows = [row for result in pool.map(run_scenario, jobs) for row in result]
        print(table(rows, lambda s: (s.grid, str(s.replicates)), ("grid", "replicates")))
        print()
        print(table(rows, lambda s: (s.shape, f"{s.crossing:g}"), ("curve", "crossing")))
        print()
        print(flag_power(args.datasets, args.seed + 500, pool))
        if args.compare_intervals:
            print()
            print(compare_intervals(max(args.datasets // 3, 10), args.seed + 1000, pool))
        if args.designs:
            print()
            print(compare_designs(args.datasets, args.seed + 2000, pool))
        if args.scaling:
            print()
            print(compare_scaling(args.datasets, args.seed + 3000, pool))
    print(f"\n{time.perf_counter() - start:.0f} s wall, {args.workers} workers")


if __name__ == "__main__":
    main()
