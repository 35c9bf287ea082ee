"""The scaling fit capacity ~ a N^b (capsweep.sweeps.scaling_fit): the closed form without censoring, censored values, caveats."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import linregress
from scipy.stats import t as student

from capsweep.sweeps.capacity_fit import CapacityFit
from capsweep.sweeps.scaling_fit import fit_scaling

SIZES = (300.0, 600.0, 1200.0, 2400.0, 4800.0)


def _fit(estimate: float | None, censoring: str = "inside", bound: int | None = None,
         non_monotone: bool = False) -> CapacityFit:
    """A per-condition capacity as the scaling fit reads it (only estimate, censoring, bound and the flag matter)."""
    return CapacityFit(estimate, None, None, censoring, bound, -3.0, (1, 12), (1.0, 0.0), 1, 12,  # type: ignore[arg-type]
                       non_monotone, 1.0, 36)


@pytest.mark.reference
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_without_censoring_it_is_least_squares_with_the_t_interval(seed: int) -> None:
    # Ordinary least squares of ln capacity on ln N and its t-interval with n - 2 degrees of freedom
    # (any regression text; scipy.stats.linregress and the Student quantile), computed here.
    rng = np.random.default_rng(seed)
    capacities = np.exp(-0.5 + 0.3 * np.log(SIZES) + rng.normal(0, 0.2, len(SIZES)))
    reference = linregress(np.log(SIZES), np.log(capacities))
    half = student.ppf(0.975, len(SIZES) - 2) * reference.stderr
    fit = fit_scaling([(n, _fit(c)) for n, c in zip(SIZES, capacities)])
    assert fit is not None
    assert fit.exponent == pytest.approx(reference.slope, abs=1e-7)
    assert fit.prefactor == pytest.approx(math.exp(reference.intercept), rel=1e-6)
    assert (fit.exponent_low, fit.exponent_high) == pytest.approx((reference.slope - half, reference.slope + half),
                                                                  abs=1e-6)
    assert fit.censored == 0 and fit.caveats == ()


def test_a_censored_capacity_enters_as_a_bound() -> None:
    # Exact capacities on the line ln c = -1 + 0.3 ln N up to 2400 (with a little scatter), and the largest size
    # censored above. A bound far below the line adds (almost) nothing: the fit is the least-squares line of the
    # others. A bound above the line pulls the exponent up. Read as an exact value it would pull less.
    scatter = np.array([0.05, -0.04, -0.03, 0.02])
    capacities = np.exp(-1 + 0.3 * np.log(SIZES[:4]) + scatter)
    exact = [(n, _fit(c)) for n, c in zip(SIZES[:4], capacities)]
    reference = linregress(np.log(SIZES[:4]), np.log(capacities))
    low_bound = fit_scaling([*exact, (4800.0, _fit(None, "above", 1))])
    assert low_bound is not None and low_bound.censored == 1
    assert low_bound.exponent == pytest.approx(reference.slope, abs=1e-4)
    high_bound = fit_scaling([*exact, (4800.0, _fit(None, "above", 12))])
    as_exact = fit_scaling([*exact, (4800.0, _fit(12.0))])
    assert high_bound is not None and as_exact is not None
    assert high_bound.exponent > as_exact.exponent > reference.slope
    assert any("censored" in c for c in high_bound.caveats)


def test_zero_capacity_enters_as_censored_below() -> None:
    capacities = np.exp(-1 + 0.3 * np.log(SIZES[1:]) + np.array([0.05, -0.04, -0.03, 0.02]))
    fit = fit_scaling([(300.0, _fit(None, "below", 1)), *((n, _fit(c)) for n, c in zip(SIZES[1:], capacities))])
    assert fit is not None and fit.censored == 1 and fit.sizes[0] == 300.0


def test_caveats_and_refusals() -> None:
    three = [(n, _fit(2.0 + i)) for i, n in enumerate(SIZES[:3])]
    fit = fit_scaling(three)
    assert fit is not None and any("only 3 network sizes" in c for c in fit.caveats)
    flagged = fit_scaling([*three, (SIZES[3], _fit(5.5, non_monotone=True))])
    assert flagged is not None and any("not monotone" in c for c in flagged.caveats)
    assert fit_scaling(three[:2]) is None  # no degree of freedom left for the scatter
    # two capacities inside the grid: a line through both, no scatter left to estimate
    assert fit_scaling([(SIZES[0], _fit(3.0)), (SIZES[1], _fit(4.0)), (SIZES[2], _fit(None, "above", 12))]) is None
    assert fit_scaling([(SIZES[0], _fit(3.0)), (SIZES[0], _fit(3.5)), (SIZES[0], _fit(2.5))]) is None  # one size
