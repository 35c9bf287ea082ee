"""Capacity against network size: capacity ~ a N^b from fitted per-condition capacities, censored ones included.

Model: ln c_j = ln a + b ln N_j + e_j with e_j ~ Normal(0, sigma^2), one value per condition j
(N_j its number of excitatory cells, c_j its fitted capacity in assemblies,
:func:`capsweep.sweeps.capacity_fit.fit_capacity`). A capacity censored ``above`` (the grid's top
still passes) contributes the probability that ln c_j exceeds ln(bound), one censored ``below``
(the smallest count already fails, e.g. capacity 0) the probability that it falls below ln(bound):
the censored-normal likelihood (Tobin 1958, Econometrica 26:24 [memory]). Nothing is dropped and no
grid top is read as exact.

sigma is the scatter of the capacities about the line: it holds both the estimation error of each
capacity and the sizes' departures from a power law, estimated from the residuals. Conditions are
weighted equally: interval widths from a few replicates are themselves too noisy to weight by
[common practice].

The interval on b is a profile-likelihood interval (Venzon & Moolgavkar 1988, Appl Stat 37:87
[memory]) with the cut-off n ln(1 + t^2 / (n - 2)), t the Student quantile with n - 2 degrees of
freedom at (1 + confidence) / 2 and n the number of conditions. Without censoring the profile
deviance of b is n ln(RSS(b) / RSS(b_hat)) = n ln(1 + T^2 / (n - 2)), T the usual t statistic
([derived]: RSS(b) = RSS(b_hat) + (b - b_hat)^2 Sxx and se^2 = RSS(b_hat) / ((n - 2) Sxx)), so the
interval is then exactly the ordinary least-squares t-interval; with censoring the same cut-off
is a small-sample calibration whose coverage ``benchmarks/capacity_coverage.py --scaling`` measures.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, minimize
from scipy.special import log_ndtr
from scipy.stats import t as student

from .capacity_fit import CapacityFit
from .sequential import CONFIDENCE

FEW_SIZES = 4
"""Fewer distinct network sizes than this earn a caveat: the exponent rests on too few points."""
SEARCH_SPAN = 50.0
"""Farthest an interval end of b is sought from its estimate; past it the end is infinite."""


@dataclass(frozen=True)
class ScalingFit:
    """capacity ~ prefactor * n_exc ** exponent (capacity in assemblies, n_exc in excitatory cells).

    ``exponent_low``/``exponent_high`` bound b at the fit's confidence (+-inf when open);
    ``scatter`` is sigma, the residual standard deviation of ln capacity; ``sizes`` the n_exc of
    the conditions used (ascending, repeated per condition); ``censored`` how many of them entered
    as censored values; ``caveats`` one sentence per reason to read b with care (empty: none).
    """

    exponent: float
    exponent_low: float
    exponent_high: float
    prefactor: float
    scatter: float
    sizes: tuple[float, ...]
    censored: int
    caveats: tuple[str, ...]


@dataclass(frozen=True)
class _Data:
    """ln sizes and ln capacities, with a censoring side per condition (0 exact, +1 above, -1 below)."""

    x: np.ndarray
    y: np.ndarray
    side: np.ndarray

    def loglik(self, alpha: float, b: float, log_sigma: float) -> tuple[float, np.ndarray]:
        """Censored-normal log-likelihood (constants left out) and its gradient in (alpha, b, ln sigma).

        Per condition, with z = (y - alpha - b x) / sigma: exact ln phi(z) - ln sigma, d/d mu = z / sigma,
        d/d ln sigma = z^2 - 1; above ln Phi(-z), d/d mu = r(z) / sigma, d/d ln sigma = r(z) z with
        r(z) = phi(z) / Phi(-z); below ln Phi(z), d/d mu = -r(-z) / sigma, d/d ln sigma = -r(-z) z [derived].
        """
        sigma = math.exp(log_sigma)
        z = (self.y - alpha - b * self.x) / sigma
        exact, above = self.side == 0, self.side > 0
        log_pdf, log_tail = -0.5 * z * z - 0.5 * math.log(2 * math.pi), log_ndtr(np.where(above, -z, z))
        value = np.where(exact, log_pdf - log_sigma, log_tail)
        ratio = np.exp(log_pdf - log_tail)
        d_mu = np.where(exact, z, np.where(above, ratio, -ratio)) / sigma
        d_log_sigma = np.where(exact, z * z - 1, np.where(above, ratio * z, -ratio * z))
        return float(np.sum(value)), np.array([d_mu.sum(), (d_mu * self.x).sum(), d_log_sigma.sum()])

    def start(self, b: float | None = None) -> np.ndarray:
        """Least-squares (alpha, b, ln sigma) treating bounds as values; ``b`` fixed when given."""
        slope = float(np.polyfit(self.x, self.y, 1)[0]) if b is None else b
        alpha = float(np.mean(self.y - slope * self.x))
        spread = float(np.std(self.y - alpha - slope * self.x))
        return np.array([alpha, slope, math.log(max(spread, 1e-3))])

    def fit(self) -> np.ndarray:
        """(alpha, b, ln sigma) of maximum likelihood."""
        def negative(p: np.ndarray) -> tuple[float, np.ndarray]:
            value, grad = self.loglik(*p)
            return -value, -grad
        return np.asarray(minimize(negative, self.start(), jac=True, method="BFGS", options={"gtol": 1e-8}).x)

    def profile(self, b: float) -> float:
        """Largest log-likelihood with the exponent fixed at ``b``."""
        def negative(p: np.ndarray) -> tuple[float, np.ndarray]:
            value, grad = self.loglik(p[0], b, p[1])
            return -value, -grad[[0, 2]]
        start = self.start(b)[[0, 2]]
        return -float(minimize(negative, start, jac=True, method="BFGS", options={"gtol": 1e-8}).fun)


def _end(deviance: Callable[[float], float], b_hat: float, direction: float, cut: float) -> float:
    """Where ``deviance`` (a function of b) first exceeds ``cut`` going from ``b_hat`` in ``direction`` (+-1):
    steps doubling from 0.05, then the root in the last step; +-inf past ``SEARCH_SPAN``."""
    inner, step = b_hat, 0.05
    while step <= SEARCH_SPAN:
        outer = b_hat + direction * step
        if deviance(outer) > cut:
            return float(brentq(lambda b: deviance(b) - cut, min(inner, outer), max(inner, outer), xtol=1e-10))
        inner, step = outer, step * 2
    return direction * math.inf


def _log_capacity(fit: CapacityFit) -> float:
    """ln of the fitted capacity, or of the bound of a censored one."""
    value = fit.estimate if fit.censoring == "inside" else fit.bound
    assert value is not None, "a fit inside its grid has an estimate, a censored one a bound"
    return math.log(value)


def _caveats(conditions: Sequence[tuple[float, CapacityFit]], censored: int) -> tuple[str, ...]:
    """One sentence per reason to read the exponent with care."""
    reasons = []
    sizes = {size for size, _ in conditions}
    if len(sizes) < FEW_SIZES:
        reasons.append(f"only {len(sizes)} network sizes: the exponent rests on too few points")
    if any(fit.non_monotone for _, fit in conditions):
        reasons.append("success is not monotone in the count for at least one size")
    if censored:
        reasons.append(f"{censored} of {len(conditions)} capacities lie outside their count grid (censored values)")
    return tuple(reasons)


MIN_INSIDE = 3
"""Fewest capacities inside their count grid (not censored) a scaling fit needs, at two sizes or more."""
NO_FIT = (f"no fit of capacity against n_exc: it needs at least {MIN_INSIDE} capacities inside their count grid, at "
          "two sizes or more (censored ones enter only as bounds beside them)")
"""What `capsweep capacity` says of a store over sizes when :func:`fit_scaling` has too little to fit."""


def fit_scaling(conditions: Sequence[tuple[float, CapacityFit]], confidence: float = CONFIDENCE) -> ScalingFit | None:
    """Fit capacity ~ a N^b over ``conditions`` (n_exc, fitted capacity), censored capacities included.

    None unless at least MIN_INSIDE capacities lie inside their grid, at two sizes or more (with two,
    the line would pass through both and the scatter vanish; see the module docstring for the
    model and the interval).
    """
    usable = [(float(size), fit) for size, fit in conditions]
    exact = [size for size, fit in usable if fit.censoring == "inside"]
    if len(exact) < MIN_INSIDE or len(set(exact)) < 2:
        return None
    usable.sort(key=lambda item: item[0])
    side = np.array([{"inside": 0, "above": 1, "below": -1}[fit.censoring] for _, fit in usable])
    data = _Data(np.log([size for size, _ in usable]), np.array([_log_capacity(fit) for _, fit in usable]), side)
    alpha, b_hat, log_sigma = data.fit()
    best = max(data.loglik(alpha, b_hat, log_sigma)[0], data.profile(b_hat))
    n = len(usable)
    cut = n * math.log1p(float(student.ppf(0.5 + confidence / 2, n - 2)) ** 2 / (n - 2))
    deviance = lambda b: 2 * (best - data.profile(b))
    censored = int(np.sum(side != 0))
    return ScalingFit(float(b_hat), _end(deviance, b_hat, -1.0, cut), _end(deviance, b_hat, 1.0, cut),
                      math.exp(alpha), math.exp(log_sigma), tuple(size for size, _ in usable), censored,
                      _caveats(usable, censored))
