"""The fitted capacity (capsweep.sweeps.capacity_fit) against closed forms, scipy, and synthetic curves with known crossings.

Closed forms are computed here with numpy/scipy, never with the code under test. The synthetic
checks draw success counts from a known curve P(c) with P(c*) = 0.5 and ask whether the 95 %
interval holds c*; they also measure the old rule ("largest count k such that every count <= k
reaches a success fraction >= 0.5"), written out here from its definition.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import isotonic_regression, minimize
from scipy.special import expit, logit
from scipy.stats import binom, chi2, power_divergence

from capsweep.sweeps.capacity_fit import binomial_deviance, fit_capacity, isotonic_decreasing
from capsweep.sweeps.sequential import Tally

GRID = tuple(range(1, 13))


def _draw(rng: np.random.Generator, p: np.ndarray, counts: tuple[int, ...], replicates: int) -> dict[int, Tally]:
    k = rng.binomial(replicates, p)
    return {c: Tally(int(s), replicates) for c, s in zip(counts, k)}


def _logistic(counts: tuple[int, ...], crossing: float, slope: float) -> np.ndarray:
    return expit(-slope * np.log(np.array(counts, float) / crossing))


def _old_rule(tallies: dict[int, Tally]) -> int:
    """Largest count k such that every count <= k has successes >= 0.5 * decided; 0 if the smallest falls short."""
    first_failure = min((c for c, t in tallies.items() if t.successes < 0.5 * t.decided), default=math.inf)
    return max((c for c in tallies if c < first_failure), default=0)


@pytest.mark.reference
@pytest.mark.parametrize(("tallies", "threshold"), [
    ({4: Tally(3, 4), 8: Tally(1, 4)}, 0.5),
    ({3: Tally(5, 5), 5: Tally(2, 6)}, 0.6),
    ({2: Tally(9, 10), 6: Tally(0, 10)}, 0.5),  # separated: the plain likelihood has no finite maximum
])
def test_two_counts_match_firths_closed_form(tallies: dict[int, Tally], threshold: float) -> None:
    # [derived] from Firth 1993 (Biometrika 80:27, Eq. 2 [memory]): with two counts the logistic model is
    # saturated, every hat value is 1, and the penalized score k - n p + (1/2 - p) vanishes at p = (k + 1/2)/(n + 1).
    (c1, t1), (c2, t2) = sorted(tallies.items())
    p1, p2 = (t1.successes + 0.5) / (t1.decided + 1), (t2.successes + 0.5) / (t2.decided + 1)
    slope = (logit(p2) - logit(p1)) / math.log(c2 / c1)
    crossing = c1 * math.exp((logit(threshold) - logit(p1)) / slope)
    fit = fit_capacity(tallies, threshold)
    assert fit is not None and fit.censoring == "inside"
    assert fit.slope == pytest.approx(slope, rel=1e-6)
    assert fit.estimate == pytest.approx(crossing, rel=1e-6)
    assert (fit.low is None or fit.low < fit.estimate) and (fit.high is None or fit.estimate < fit.high)


@pytest.mark.reference
def test_isotonic_by_hand_and_against_scipy() -> None:
    # Pool-adjacent-violators by hand (Ayer et al. 1955, Ann Math Stat 26:641 [memory]): 0.5 < 0.8 pools to 0.65;
    # with weights 3 and 1, 0.2 < 0.6 pools to (3 * 0.2 + 0.6) / 4 = 0.3.
    assert isotonic_decreasing(np.array([1, 0.5, 0.8, 0.2]), np.ones(4)) == pytest.approx([1, 0.65, 0.65, 0.2])
    assert isotonic_decreasing(np.array([0.2, 0.6]), np.array([3, 1])) == pytest.approx([0.3, 0.3])


@settings(deadline=None)  # no timing in tests: the machine may be busy
@given(st.lists(st.tuples(st.integers(0, 10), st.integers(1, 10)), min_size=1, max_size=12))
def test_isotonic_matches_scipy(pairs: list[tuple[int, int]]) -> None:
    k = np.array([min(s, n) for s, n in pairs], float)
    n = np.array([n for _, n in pairs], float)
    expected = isotonic_regression(k / n, weights=n, increasing=False).x
    assert isotonic_decreasing(k / n, n) == pytest.approx(expected, abs=1e-12)


@settings(deadline=None)  # no timing in tests: the machine may be busy
@given(st.lists(st.tuples(st.integers(0, 10), st.integers(1, 10), st.floats(0.01, 0.99)), min_size=1, max_size=8))
def test_deviance_matches_scipys_g_statistic(rows: list[tuple[int, int, float]]) -> None:
    # G^2 of observed against expected cell counts (Read & Cressie 1988 power divergence, lambda = 0): scipy's
    # power_divergence(lambda_="log-likelihood") per count's 2-cell table, summed.
    k = np.array([min(s, n) for s, n, _ in rows], float)
    n = np.array([n for _, n, _ in rows], float)
    p = np.array([q for _, _, q in rows])
    expected = sum(power_divergence([ki, ni - ki], [ni * pi, ni * (1 - pi)], lambda_="log-likelihood")[0]
                   for ki, ni, pi in zip(k, n, p))
    assert float(binomial_deviance(k, n, p)) == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_censoring_says_where_the_grid_ends() -> None:
    everything = fit_capacity({c: Tally(3, 3) for c in GRID})
    nothing = fit_capacity({c: Tally(0, 3) for c in GRID})
    assert everything is not None and nothing is not None
    assert (everything.censoring, everything.bound, everything.estimate, everything.high) == ("above", 12, None, None)
    assert (nothing.censoring, nothing.bound, nothing.estimate, nothing.low) == ("below", 1, None, None)
    single = fit_capacity({5: Tally(1, 3)})
    assert single is not None and (single.censoring, single.bound) == ("below", 5)
    assert fit_capacity({}) is None and fit_capacity({4: Tally(0, 0)}) is None
    for wrong in ({0: Tally(1, 3)}, {4: Tally(4, 3)}, {4: Tally(-1, 3)}):
        with pytest.raises(ValueError, match="successes <= decided"):
            fit_capacity(wrong)


def test_counts_without_decided_replicates_are_absent_not_failures() -> None:
    decided = {c: Tally(3 if c <= 5 else 0, 3) for c in range(1, 9)}
    pending_top = {**decided, 9: Tally(0, 0), 10: Tally(0, 0)}
    assert fit_capacity(pending_top) == fit_capacity(decided)


def test_capacity_scales_with_the_counts() -> None:
    # The model is logistic in ln(count): doubling every count doubles the crossing and its interval.
    tallies = {1: Tally(10, 10), 2: Tally(10, 10), 3: Tally(9, 10), 4: Tally(6, 10), 5: Tally(3, 10), 6: Tally(1, 10),
               7: Tally(0, 10), 8: Tally(0, 10)}
    once, twice = fit_capacity(tallies), fit_capacity({2 * c: t for c, t in tallies.items()})
    assert once is not None and twice is not None
    for a, b in ((once.estimate, twice.estimate), (once.low, twice.low), (once.high, twice.high)):
        assert a is not None and b is not None and b == pytest.approx(2 * a, rel=0.01)


def test_nonmonotone_flag_false_positives_and_power() -> None:
    # Control: a monotone curve (logistic, crossing 6, slope 5), 40 seeded data sets at 5 replicates: flags are
    # false positives and stay near the 5 % design level. Power: success collapses at counts 3-4 only.
    rng = np.random.default_rng(11)
    monotone = _logistic(GRID, 6.0, 5.0)
    dip = monotone.copy()
    dip[2:4] = 0.05
    false = [fit_capacity(_draw(rng, monotone, GRID, 5)).non_monotone for _ in range(40)]  # type: ignore[union-attr]
    true = [fit_capacity(_draw(rng, dip, GRID, 5)).non_monotone for _ in range(20)]  # type: ignore[union-attr]
    assert np.mean(false) <= 0.10
    assert np.mean(true) >= 0.6


@pytest.mark.reference
def test_coverage_of_the_95_percent_interval_on_known_crossings() -> None:
    # Synthetic curves with known crossings, in the fitted family (logistic) and outside it (Weibull-type
    # P = exp(-ln 2 (c/c*)^6)); 1..12, 3 and 10 replicates; 100 seeded data sets in all.
    rng = np.random.default_rng(2026)
    curves = [(_logistic(GRID, 6.0, 5.0), 6.0), (_logistic(GRID, 3.3, 3.0), 3.3),
              (np.exp(-math.log(2) * (np.array(GRID) / 8.5) ** 6), 8.5)]
    covered = []
    for p, crossing in curves:
        for replicates in (3, 10):
            for _ in range(17):
                fit = fit_capacity(_draw(rng, p, GRID, replicates))
                assert fit is not None
                covered.append((fit.low is None or fit.low <= crossing) and (fit.high is None or crossing <= fit.high))
    assert np.mean(covered) >= 0.90


@pytest.mark.reference
def test_old_rule_is_biased_low_where_the_fit_is_not() -> None:
    # The case: true 50 % point at 6 odours, 3 replicates, grid 1..12 -> the old rule gives about 5.2.
    # Exact expectation [derived]: E[old] = sum_k P(every count <= k passes) = sum_k prod_{j<=k} P(Bin(3, p_j) >= 2)
    # for the logistic curve of slope 5 in ln(count); scipy's binomial survival function.
    p = _logistic(GRID, 6.0, 5.0)
    expected_old = float(np.sum(np.cumprod(binom.sf(1, 3, p))))
    assert expected_old == pytest.approx(5.2, abs=0.1)
    rng = np.random.default_rng(7)
    data = [_draw(rng, p, GRID, 3) for _ in range(60)]
    old = [_old_rule(t) for t in data]
    assert np.mean(old) == pytest.approx(expected_old, abs=3 * np.std(old) / math.sqrt(len(old)))
    estimates = [f.estimate for t in data if (f := fit_capacity(t)) is not None and f.estimate is not None]
    assert len(estimates) >= 55
    assert abs(np.median(estimates) - 6.0) < 0.3 < 6.0 - expected_old


def _penalized_loglik(b: np.ndarray, x: np.ndarray, k: np.ndarray, n: np.ndarray) -> float:
    """Binomial log-likelihood of logit P = b0 + b1 x plus Firth's penalty 1/2 ln det(X' W X), W = n p (1 - p)
    (Firth 1993, Biometrika 80:27, Eq. 2 [memory]: the Jeffreys-prior penalty), written out here with numpy."""
    p = expit(b[0] + b[1] * x)
    design = np.column_stack([np.ones_like(x), x])
    info = design.T @ ((n * p * (1 - p))[:, None] * design)
    return float(np.sum(k * np.log(p) + (n - k) * np.log1p(-p)) + 0.5 * np.linalg.slogdet(info)[1])


@pytest.mark.reference
def test_penalized_fit_and_profile_interval_match_scipy_optimize() -> None:
    # 20 replicates per count 1..12 falling through one half near 6. Reference: scipy.optimize.minimize (Nelder-Mead)
    # of the penalized likelihood above; the profile at a fixed crossing theta maximizes over curves with
    # b0 = logit(1/2) - b1 theta. The interval's low end must sit where the profile deviance reaches the chi-square(1)
    # 95 % quantile (Venzon & Moolgavkar 1988, Appl Stat 37:87 [memory]); its high end here is widened to the
    # isotonic bracket's first failing count (7), where the deviance is past that quantile.
    counts = np.arange(1, 13)
    k = np.array([20, 20, 19, 18, 15, 12, 8, 5, 3, 1, 1, 0], float)
    n = np.full(12, 20.0)
    x = np.log(counts)
    fit = fit_capacity({int(c): Tally(int(s), 20) for c, s in zip(counts, k)})
    assert fit is not None and fit.estimate is not None and fit.low is not None and fit.high is not None
    options = {"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000}
    best = minimize(lambda b: -_penalized_loglik(b, x, k, n), np.array([0.0, -1.0]), method="Nelder-Mead",
                    options=options)
    b0, b1 = best.x
    assert fit.slope == pytest.approx(b1, rel=1e-5)
    assert fit.estimate == pytest.approx(math.exp(-b0 / b1), rel=1e-5)

    def deviance(count: float) -> float:
        theta = math.log(count)
        profile = minimize(lambda s: -_penalized_loglik(np.array([-s[0] * theta, s[0]]), x, k, n), np.array([b1]),
                           method="Nelder-Mead", options=options)
        return float(2 * (profile.fun - best.fun))

    assert deviance(fit.low) == pytest.approx(chi2.ppf(0.95, 1), abs=0.05)
    assert fit.high == fit.isotonic_fail == 7 and deviance(7.0) > chi2.ppf(0.95, 1)
