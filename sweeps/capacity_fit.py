"""Fitted capacity of one condition: where a monotone success curve P(success | count) crosses the threshold.

Input: per assembly count, k successes out of n decided replicates (:class:`~capsweep.sweeps.sequential.Tally`);
counts with n = 0 are simply absent, so pending and unneeded points never count as failures.

- **Model.** logit P(c) = b0 + b1 ln c with b1 <= 0 (success cannot rise with the count), fitted
  to every replicate by maximum likelihood with Firth's penalty: the log-likelihood plus
  1/2 ln det I(b), I the Fisher information (Firth 1993, Biometrika 80:27, Eq. 2 [memory]). With
  few replicates the counts are often completely separated (all successes up to some count,
  all failures above); the plain maximum-likelihood slope is then infinite and the crossing
  anywhere in the gap. Firth's penalty (the Jeffreys prior) keeps the estimates finite and unique
  (Heinze & Schemper 2002, Stat Med 21:2409; Kosmidis & Firth 2021, Biometrika 108:71 [memory])
  and removes the O(1/n) bias of the slope.
- **Capacity** = the count c* where the fitted P equals the threshold, ln c* = (logit t - b0) / b1.
- **Its interval** is the penalized profile-likelihood interval (Venzon & Moolgavkar 1988, Appl
  Stat 37:87; Heinze & Schemper 2002 [memory]), the ln c* whose profile deviance (slope re-fitted
  at each fixed crossing) stays within the chi-square(1) quantile at ``confidence``, widened where
  needed to hold the isotonic bracket (below). Where the crossing lies between two neighbouring
  counts is told by the curve's assumed shape alone, so the interval claims no finer resolution
  than the grid gives without a shape. Chosen by measured coverage (``benchmarks/capacity_coverage.py
  --compare-intervals``, 594 data sets, December 2026): the profile alone, the plain-likelihood
  profile and the parametric bootstrap all covered 91-93 % overall but only 64 % where the true
  curve is not logistic in ln(count) and replicates are many (Weibull-type, 20 replicates: the
  shape's bias outweighs the noise); widened, 98 % overall and at least 91 % in every scenario, at
  a median width 1.58 instead of 1.39 assemblies.
- **Censoring.** Only crossings inside the grid of decided counts are reported. A fitted crossing
  below the smallest count is ``below`` (capacity < that count, the ``bound``); above the largest,
  ``above`` (capacity >= that count). An interval end beyond the grid is None (open); a confidence
  set wholly outside the grid is clipped to the grid edge. With one decided count there is no
  slope: the count's fraction alone says ``below`` (< threshold) or ``above``.
- **Model-free check.** Isotonic regression (as pool-adjacent-violators computes it; Ayer, Brunk, Ewing, Reid &
  Silverman 1955, Ann Math Stat 26:641; Barlow, Bartholomew, Bremner & Brunk 1972, Statistical
  Inference under Order Restrictions, Wiley [memory]) gives the non-increasing fractions closest
  to the observed ones in the binomial likelihood (weights n); the isotonic bracket is its last
  passing and first failing count.
- **Non-monotone flag.** Statistic: the deviance G^2 of the isotonic fit against the observed
  fractions (0 when the fractions never rise). Its p-value is a parametric bootstrap from the
  isotonic fit (``MONOTONE_RESAMPLES`` draws at the fixed seed ``MONOTONE_SEED``, so the flag is
  a function of the tallies); flagged when p < ``MONOTONE_LEVEL``. Designed false-positive rate
  5 % under a monotone curve; measured in ``benchmarks/capacity_coverage.py``.

Units: counts are numbers of assemblies (odours); slopes are in logit per unit ln(count).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import expit, log_expit, logit, xlogy
from scipy.stats import chi2

from .sequential import CONFIDENCE, Tally
from .success import MIN_FRACTION

MONOTONE_LEVEL = 0.05
"""The non-monotone flag's level: its false-positive rate under a monotone success curve."""
MONOTONE_RESAMPLES = 199
"""Parametric-bootstrap draws behind the non-monotone p-value (resolution 1 / 200)."""
MONOTONE_SEED = 20261
"""Fixed seed of those draws: the p-value is a function of the tallies alone."""
PROFILE_SLOPES = np.geomspace(0.01, 1e4, 180)
"""Descents of the logit per unit ln(count) (besides 0) over which the profile maximizes (ratio 1.08)."""
COARSE_STEP = 0.05
"""Spacing, in ln(count), of the crossings at which the profile deviance is first evaluated."""
THETA_STEP = 0.01
"""Spacing, in ln(count), of the finer evaluation around each interval end (1 % in count; the end is
interpolated linearly between them)."""
NEWTON_ITERATIONS = 100
"""Most Newton-Raphson steps of the penalized fit."""

Censoring = Literal["inside", "below", "above"]


@dataclass(frozen=True)
class CapacityFit:
    """Fitted capacity of one condition (counts in assemblies).

    ``estimate`` is the fitted crossing (None unless ``censoring == "inside"``); ``low``/``high``
    its interval at the fit's confidence (the profile interval widened to hold
    ``isotonic_pass``..``isotonic_fail``), None for an end beyond the grid; ``bound`` the smallest
    decided count (censoring ``below``: capacity < bound) or the largest (``above``: capacity >=
    bound), None inside. ``slope`` d logit P / d ln(count) (<= 0; nan with one count).
    ``counts``, ``isotonic``: the decided counts (ascending) and the isotonic success fractions;
    ``isotonic_pass``/``isotonic_fail`` the largest count whose isotonic fraction reaches the
    threshold and the smallest below it (None if there is none). ``replicates``: decided
    replicates used.
    """

    estimate: float | None
    low: float | None
    high: float | None
    censoring: Censoring
    bound: int | None
    slope: float
    counts: tuple[int, ...]
    isotonic: tuple[float, ...]
    isotonic_pass: int | None
    isotonic_fail: int | None
    non_monotone: bool
    non_monotone_p: float
    replicates: int


def isotonic_decreasing(fractions: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Weighted least-squares non-increasing fit of ``fractions`` (shape (..., m), one fit per leading index).

    The min-max formula f_i = min_{s <= i} max_{t >= i} Av(s, t), Av the weighted mean of
    fractions s..t (Barlow et al. 1972 [memory]), the same fit pool-adjacent-violators computes
    sequentially; vectorized so that the bootstrap draws of :func:`monotone_pvalue` fit at once.
    With binomial fractions and weights n (shape (m,)) it is also the maximum-likelihood
    non-increasing fit.
    """
    y, w = np.asarray(fractions, float), np.asarray(weights, float)
    m = w.shape[-1]
    total_w = np.concatenate([[0.0], np.cumsum(w)])
    total_y = np.concatenate([np.zeros(y.shape[:-1] + (1,)), np.cumsum(y * w, axis=-1)], axis=-1)
    later = np.arange(m)[None, :] >= np.arange(m)[:, None]  # [s, t]: t >= s
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (total_y[..., None, 1:] - total_y[..., :-1, None]) / (total_w[None, 1:] - total_w[:-1, None])
    mean = np.where(later, mean, -np.inf)
    upper = np.flip(np.maximum.accumulate(np.flip(mean, -1), axis=-1), -1)  # [s, i]: max over t >= i
    return np.min(np.where(later, upper, np.inf), axis=-2)


def binomial_deviance(successes: np.ndarray, trials: np.ndarray, p: np.ndarray) -> np.ndarray:
    """G^2 = 2 sum [k ln(k / n p) + (n - k) ln((n - k) / n (1 - p))] over the last axis (0 ln 0 = 0)."""
    k, n = np.asarray(successes, float), np.asarray(trials, float)
    observed = k / n
    terms = xlogy(k, observed) - xlogy(k, p) + xlogy(n - k, 1 - observed) - xlogy(n - k, 1 - p)
    return 2 * np.sum(terms, axis=-1)


def monotone_pvalue(successes: np.ndarray, trials: np.ndarray) -> float:
    """P-value of "success does not rise with the count" (arrays over ascending counts; see the module docstring)."""
    k, n = np.asarray(successes, int), np.asarray(trials, int)
    fit = isotonic_decreasing(k / n, n)
    observed = float(binomial_deviance(k, n, fit))
    if observed <= 1e-9:
        return 1.0
    draws = np.random.default_rng(MONOTONE_SEED).binomial(n, fit, size=(MONOTONE_RESAMPLES, len(n)))
    resampled = binomial_deviance(draws, n, isotonic_decreasing(draws / n, n))
    return (1 + int(np.sum(resampled >= observed - 1e-9))) / (MONOTONE_RESAMPLES + 1)


@dataclass(frozen=True)
class _Curve:
    """Binomial data on x = ln(count) and the logistic log-likelihood, Firth-penalized when ``firth``."""

    x: np.ndarray  # ln(count), ascending, shape (m,)
    k: np.ndarray  # successes, shape (m,)
    n: np.ndarray  # decided replicates, shape (m,)
    target: float  # logit(threshold)
    firth: bool = True

    def loglik(self, b0: np.ndarray | float, b1: np.ndarray | float) -> np.ndarray:
        """(Penalized) log-likelihood at (b0, b1), broadcast over their shapes (binomial constants left out)."""
        b0, b1 = np.asarray(b0, float)[..., None], np.asarray(b1, float)[..., None]
        eta = b0 + b1 * self.x
        log_p = log_expit(eta)
        log_q = log_p - eta  # ln(1 - p)
        loglik = np.sum(self.k * log_p + (self.n - self.k) * log_q, axis=-1)
        if not self.firth:
            return loglik
        w = self.n * np.exp(log_p + log_q)
        s0, s1, s2 = np.sum(w, -1), np.sum(w * self.x, -1), np.sum(w * self.x ** 2, -1)
        with np.errstate(divide="ignore"):
            return loglik + 0.5 * np.log(np.maximum(s0 * s2 - s1 ** 2, 0.0))

    def _newton_step(self, b: np.ndarray) -> np.ndarray:
        """I(b)^-1 U*(b), U* = sum_i (k_i - n_i p_i + h_i (1/2 - p_i)) (1, x_i) the penalized score (Firth 1993)."""
        design = np.column_stack([np.ones_like(self.x), self.x])
        p = expit(design @ b)
        w = self.n * p * (1 - p)
        info = design.T @ (w[:, None] * design)
        inverse = np.linalg.pinv(info)
        hat = w * np.einsum("ij,jk,ik->i", design, inverse, design)
        return inverse @ (design.T @ (self.k - self.n * p + hat * (0.5 - p)))

    def fit(self) -> tuple[float, float]:
        """(b0, b1) maximizing the penalized log-likelihood with b1 <= 0 (whatever ``firth`` says).

        Newton-Raphson on the penalized score with step halving (Heinze & Schemper 2002 [memory]);
        when the free maximum rises with the count, the constrained one is the flat curve, whose
        penalized maximum is p = (K + 1) / (N + 2) ([derived]: at b1 = 0, 1/2 ln det I = ln p(1-p) + const).
        """
        if not self.firth:
            return replace(self, firth=True).fit()
        b = np.array([float(logit((self.k.sum() + 0.5) / (self.n.sum() + 1.0))), 0.0])
        value = float(self.loglik(*b))
        for _ in range(NEWTON_ITERATIONS):
            step = self._newton_step(b)
            while (new := float(self.loglik(*(b + step)))) < value and np.max(np.abs(step)) > 1e-10:
                step = step / 2
            b, value = b + step, max(new, value)
            if np.max(np.abs(step)) < 1e-9:
                break
        if b[1] > 0:
            return float(logit((self.k.sum() + 1.0) / (self.n.sum() + 2.0))), 0.0
        return float(b[0]), float(b[1])

    def profile(self, thetas: np.ndarray) -> np.ndarray:
        """Per ln(count) in ``thetas`` (shape (T,)): the largest (penalized) log-likelihood among curves crossing the
        threshold there (shape (T,)), over slope 0 and ``PROFILE_SLOPES``, each interior maximum refined by the
        vertex of the parabola through it and its neighbours in ln(slope)."""
        slopes = np.concatenate([[0.0], PROFILE_SLOPES])
        thetas = np.asarray(thetas, float)[:, None]
        values = self.loglik(self.target + slopes * thetas, -slopes + 0 * thetas)
        rows, i = np.arange(len(values)), np.clip(np.argmax(values, axis=1), 2, len(slopes) - 2)
        left, mid, right = values[rows, i - 1], values[rows, i], values[rows, i + 1]
        with np.errstate(invalid="ignore", divide="ignore"):
            vertex = mid - (right - left) ** 2 / (8 * (right - 2 * mid + left))
        concave = (right - 2 * mid + left < 0) & (mid >= left) & (mid >= right)
        return np.maximum(values.max(axis=1), np.where(concave, vertex, -np.inf))


def _crossing(b0: float, b1: float, target: float) -> float:
    """ln(count) where logit P = target; +-inf for a flat curve (above or below the threshold everywhere)."""
    if b1 < 0:
        return (target - b0) / b1
    return math.inf if b0 >= target else -math.inf


def _interval(curve: _Curve, theta: float, best: float, cut: float) -> tuple[float | None, float | None]:
    """Ends (ln count) of {theta: profile deviance <= cut} on the grid's span [x_1, x_m].

    The deviance is evaluated every ``COARSE_STEP`` (and at the fitted crossing ``theta``), then
    every ``THETA_STEP`` around each end, each end interpolated linearly between grid points. An end
    that reaches the span's edge is None (open). When no point is inside, the set lies wholly past
    the edge on the fitted crossing's side: both ends are that edge, the outer one None.
    """
    x_lo, x_hi = float(curve.x[0]), float(curve.x[-1])
    coarse = np.linspace(x_lo, x_hi, int(np.ceil((x_hi - x_lo) / COARSE_STEP)) + 1)
    coarse = np.union1d(coarse, [theta] if x_lo < theta < x_hi else [])
    values = curve.profile(coarse)
    if not curve.firth:  # no exact maximum to start from: refine the grid's
        top = int(np.argmax(values))
        refined = minimize_scalar(lambda t: -float(curve.profile(np.array([t]))[0]), method="bounded",
                                  bounds=(coarse[max(top - 1, 0)], coarse[min(top + 1, len(coarse) - 1)]))
        best = -float(refined.fun)
    best = max(best, float(values.max()))
    deviance = lambda t: 2 * (best - curve.profile(t))
    inside = np.flatnonzero(2 * (best - values) <= cut)
    if not len(inside):
        return (None, x_lo) if theta < x_lo else (x_hi, None)

    def end(i: int, j: int) -> float:
        """The root between coarse points i (inside) and j (outside), on a fine grid."""
        fine = np.linspace(coarse[i], coarse[j], int(np.ceil(abs(coarse[j] - coarse[i]) / THETA_STEP)) + 1)
        values = deviance(fine)
        k = int(np.argmax(values > cut))  # first fine point outside, counted from the inside point
        return float(np.interp(cut, [values[k - 1], values[k]], [fine[k - 1], fine[k]]))

    first, last = int(inside[0]), int(inside[-1])
    return (None if first == 0 else end(first, first - 1)), (None if last == len(coarse) - 1 else end(last, last + 1))


def _crossing_interval(curve: _Curve, confidence: float) -> tuple[float, float | None, float | None, float]:
    """(crossing, low, high, slope): the fitted ln(count) of the crossing and its profile interval on the grid."""
    b0, b1 = curve.fit()
    theta = _crossing(b0, b1, curve.target)
    low, high = _interval(curve, theta, float(curve.loglik(b0, b1)) if curve.firth else -math.inf,
                          float(chi2.ppf(confidence, 1)))
    return theta, low, high, b1


def fit_capacity(tallies: Mapping[int, Tally], threshold: float = MIN_FRACTION,
                 confidence: float = CONFIDENCE) -> CapacityFit | None:
    """Fitted capacity of one condition from its per-count tallies (see the module docstring); None with no data.

    ``tallies`` maps assembly counts (>= 1) to their tallies; ``threshold`` in (0, 1) is the success
    fraction that defines capacity, ``confidence`` the interval's level.
    """
    if not 0 < threshold < 1:
        raise ValueError(f"threshold must lie in (0, 1), got {threshold}")
    wrong = [c for c, t in tallies.items() if c < 1 or not 0 <= t.successes <= t.decided]
    if wrong:
        raise ValueError(f"counts must be >= 1 with 0 <= successes <= decided; not so at {sorted(wrong)}")
    counts = sorted(c for c, t in tallies.items() if t.decided > 0)
    if not counts:
        return None
    k = np.array([tallies[c].successes for c in counts], float)
    n = np.array([tallies[c].decided for c in counts], float)
    iso = isotonic_decreasing(k / n, n)
    passing = sum(bool(p >= threshold) for p in iso)
    if len(counts) == 1:
        theta, low, high, slope = (math.inf if passing else -math.inf), None, None, math.nan
    else:
        theta, low, high, slope = _crossing_interval(_Curve(np.log(counts), k, n, float(logit(threshold))), confidence)
    censoring: Censoring = "below" if theta < math.log(counts[0]) else "above" if theta > math.log(counts[-1]) \
        else "inside"
    p_value = monotone_pvalue(k, n)
    last_pass = counts[passing - 1] if passing else None
    first_fail = counts[passing] if passing < len(counts) else None
    return CapacityFit(
        estimate=math.exp(theta) if censoring == "inside" else None,
        low=None if low is None or last_pass is None else min(math.exp(low), last_pass),
        high=None if high is None or first_fail is None else max(math.exp(high), first_fail),
        censoring=censoring, bound={"below": counts[0], "above": counts[-1]}.get(censoring), slope=slope,
        counts=tuple(counts), isotonic=tuple(float(p) for p in iso), isotonic_pass=last_pass,
        isotonic_fail=first_fail, non_monotone=p_value < MONOTONE_LEVEL, non_monotone_p=p_value,
        replicates=int(n.sum()))
