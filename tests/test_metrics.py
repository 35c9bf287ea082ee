"""Metric functions on constructed spike trains; expected values computed independently here."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import pearsonr

from capsweep.runners import metrics


def _counts_example() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """10 cells: members 0-4 (cued 0-1), non-members 5-9, with hand-chosen spike counts."""
    counts = np.array([9, 8, 4, 0, 3, 0, 1, 0, 2, 0], dtype=float)
    members = np.zeros(10, dtype=bool)
    members[:5] = True
    cued = np.zeros(10, dtype=bool)
    cued[:2] = True
    return counts, members, cued


def test_recall_quality_is_pearson_over_uncued_cells() -> None:
    counts, members, cued = _counts_example()
    expected = pearsonr(counts[2:], members[2:].astype(float))[0]  # scipy, uncued cells 2..9
    assert metrics.recall_quality(counts, members, cued) == pytest.approx(expected, abs=1e-12)


def test_recall_quality_perfect_completion_is_one_and_silence_is_undefined() -> None:
    _, members, cued = _counts_example()
    perfect = members.astype(float) * 6
    assert metrics.recall_quality(perfect, members, cued) == pytest.approx(1.0)
    assert np.isnan(metrics.recall_quality(np.zeros(10), members, cued))


def test_completion_and_spurious_count_cells_above_the_active_rate() -> None:
    counts, members, cued = _counts_example()
    # window 0.5 s, active above 5 Hz = more than 2.5 spikes: uncued members 2,3,4 have 4,0,3 -> 2 of 3;
    # non-members 5..9 have 0,1,0,2,0 -> none active. Hand-counted.
    assert metrics.completion(counts, 0.5, members, cued, 5.0) == pytest.approx(2 / 3)
    assert metrics.spurious(counts, 0.5, members, 5.0) == 0.0
    # active above 3 Hz (> 1.5 spikes): non-member 8 (2 spikes) counts -> 1 of 5.
    assert metrics.spurious(counts, 0.5, members, 3.0) == pytest.approx(1 / 5)


def test_cross_talk_is_best_other_score_outside_the_cued_assembly_and_nan_for_one() -> None:
    counts, members, cued = _counts_example()
    other_a = np.zeros(10, dtype=bool)
    other_a[[4, 8]] = True  # cell 4 is shared with the cued assembly: left out
    other_b = np.zeros(10, dtype=bool)
    other_b[[6, 7, 9]] = True
    memberships = np.stack([members, other_a, other_b])
    outside = ~members  # cells 5..9
    assert metrics.cross_talk(counts, memberships, 0) == pytest.approx(
        max(_overlap(counts[outside], other_a[outside]), _overlap(counts[outside], other_b[outside])))
    assert np.isnan(metrics.cross_talk(counts, members[None, :], 0))


def _overlap(rates: np.ndarray, xi: np.ndarray) -> float:
    """Amit, Gutfreund & Sompolinsky 1985 (Phys Rev Lett 55:1530) overlap on rates, written out here:
    m = sum (xi - a) r / (N a (1 - a) mean(r | xi)), a = mean(xi)."""
    a = xi.mean()
    return float(np.sum((xi - a) * rates) / (len(rates) * a * (1 - a) * rates[xi].mean()))


def test_recall_score_is_the_normalised_overlap_over_uncued_cells() -> None:
    counts, members, cued = _counts_example()
    assert metrics.recall_score(counts, members, cued) == pytest.approx(_overlap(counts[2:], members[2:]), abs=1e-12)
    # [derived] the overlap reduces to 1 - mean(non-members) / mean(members): 1 - (3/5) / (7/3)
    assert metrics.recall_score(counts, members, cued) == pytest.approx(1 - (3 / 5) / (7 / 3))
    assert metrics.recall_score(members * 6.0, members, cued) == pytest.approx(1.0)  # perfect completion
    assert metrics.recall_score(np.full(10, 4.0), members, cued) == pytest.approx(0.0)  # chance


def _fixed_rate_counts(n_exc: int, window_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Expected counts of uncued members at 20 Hz, cued members at 73 Hz, others at 2.7 Hz; 60 members, 30 cued."""
    members = np.zeros(n_exc, dtype=bool)
    members[:60] = True
    cued = np.zeros(n_exc, dtype=bool)
    cued[:30] = True
    counts = np.where(members, 20.0, 2.7) * window_s
    counts[cued] = 73.0 * window_s
    return counts, members, cued


@pytest.mark.parametrize("n_exc", [300, 1000, 4000])
def test_recall_score_does_not_depend_on_network_size(n_exc: int) -> None:
    """Same per-cell rates at every size (uncued members 20 Hz, others 2.7 Hz, 0.18 s window): the
    score is 1 - 2.7 / 20 [derived from the overlap formula above] at each size, exactly for the
    expected counts and within Poisson noise for drawn ones, while Pearson's r with membership
    falls with the coding level (that is why success uses the score)."""
    counts, members, cued = _fixed_rate_counts(n_exc, 0.18)
    assert metrics.recall_score(counts, members, cued) == pytest.approx(1 - 2.7 / 20, abs=1e-12)
    rng = np.random.default_rng(n_exc)

    def noisy(n: int) -> tuple[float, float]:
        c, m, q = _fixed_rate_counts(n, 0.18)
        draws = [rng.poisson(c).astype(float) for _ in range(200)]
        return (float(np.mean([metrics.recall_score(d, m, q) for d in draws])),
                float(np.mean([pearsonr(d[~q], m[~q].astype(float))[0] for d in draws])))

    score, pearson = noisy(n_exc)
    assert score == pytest.approx(1 - 2.7 / 20, abs=0.02)
    if n_exc > 300:
        assert pearson < noisy(300)[1] - 0.1


def test_rate_contrast_in_non_member_standard_deviations() -> None:
    counts, members, cued = _counts_example()
    others = counts[5:]  # 0, 1, 0, 2, 0
    expected = (np.mean(counts[2:5]) - others.mean()) / others.std()
    assert metrics.rate_contrast(counts, members, cued) == pytest.approx(expected)


def test_pathway_means_split_in_out_and_within() -> None:
    members = np.array([[True, True, False, False]])  # cells 0, 1 in the assembly; 2, 3 outside
    pre = np.array([0, 1, 2, 3, 0, 2])
    post = np.array([1, 0, 0, 1, 2, 3])
    w = np.array([0.3, 0.5, 0.06, 0.04, 0.02, 0.05])
    into, out, within = metrics.pathway_means(w, pre, post, members)
    assert (into, out, within) == pytest.approx((0.05, 0.02, 0.4))  # hand-computed


# Three overlapping assemblies over 7 cells: A0 = {0, 1, 2}, A1 = {2, 3}, A2 = {4}; cells 5 and 6 in none.
_MEMBERS = np.zeros((3, 7), dtype=bool)
_MEMBERS[0, [0, 1, 2]] = _MEMBERS[1, [2, 3]] = _MEMBERS[2, 4] = True
_PRE = np.array([0, 1, 2, 0, 3, 4, 2, 5, 1, 5, 6])
_POST = np.array([1, 2, 3, 3, 1, 0, 4, 0, 6, 6, 4])
_CLASS = ["within"] * 3 + ["between"] * 4 + ["in", "out", "background", "in"]
"""Each synapse's class by hand: (0,1) (1,2) share A0, (2,3) shares A1; (0,3) (3,1) (4,0) (2,4) join cells of
assemblies that share none (2 is in A0 and A1, 4 only in A2); (5,0) and (6,4) enter an assembly from outside,
(1,6) leaves one, (5,6) joins two cells of none."""


def test_synapse_classes_partition_the_synapses_by_hand() -> None:
    classes = metrics.synapse_classes(_PRE, _POST, _MEMBERS)
    for name, mask in classes.items():
        np.testing.assert_array_equal(mask, np.array(_CLASS) == name, err_msg=name)
    assert sum(mask.astype(int) for mask in classes.values()).tolist() == [1] * len(_PRE)


def test_mean_between_assemblies_and_upper_shares_by_hand() -> None:
    """Means over hand-picked synapses; the upper state is w_ref > w_P/2 (strict: w_ref = w_P/2 is not in it)."""
    w = np.array([0.30, 0.20, 0.40, 0.01, 0.03, 0.05, 0.07, 0.9, 0.9, 0.9, 0.9])
    classes = metrics.synapse_classes(_PRE, _POST, _MEMBERS)
    assert metrics.mean_over(w, classes["between"]) == pytest.approx((0.01 + 0.03 + 0.05 + 0.07) / 4)
    w_ref = np.array([0.2, 0.1, 0.125, 0.3, 0.0, 0.13, 0.01, 0.2, 0.0, 0.0, 0.0])
    w_p = 0.25
    assert metrics.upper_share(w_ref, classes["within"], w_p) == pytest.approx(1 / 3)  # 0.2 only; 0.125 = w_P/2
    assert metrics.upper_share(w_ref, classes["between"], w_p) == pytest.approx(2 / 4)  # 0.3 and 0.13
    other = ~(classes["within"] | classes["between"])
    assert metrics.upper_share(w_ref, other, w_p) == pytest.approx(1 / 4)  # 0.2 of (5,0)
    assert np.isnan(metrics.upper_share(w_ref, np.zeros(len(w_ref), dtype=bool), w_p))
    assert np.isnan(metrics.mean_over(w, metrics.synapse_classes(_PRE, _POST, _MEMBERS[:1])["between"]))  # one assembly


def test_window_counts_and_mean_rate_use_half_open_windows() -> None:
    times = np.array([0.1, 0.2, 0.5, 0.5, 0.9, 1.0])
    cells = np.array([0, 1, 1, 2, 0, 0])
    np.testing.assert_array_equal(metrics.window_counts(times, cells, 3, 0.2, 1.0), [1, 2, 1])
    assert metrics.mean_rate(times, 3, 0.0, 1.0) == pytest.approx(5 / 3)


def test_binned_rate_counts_edge_spikes_in_the_later_bin() -> None:
    dt = 1e-4
    steps = np.array([0, 99, 100, 100, 250, 299])  # 10 ms bins: 2, 2, 2
    rate = metrics.binned_rate(steps * dt, n_cells=4, bin_s=0.01, duration_s=0.03)
    np.testing.assert_allclose(rate, [2 / (4 * 0.01)] * 3)


def _step_trace(low: float, high: float, t_switch: float, duration: float, bin_s: float) -> np.ndarray:
    ends = (np.arange(int(round(duration / bin_s))) + 1) * bin_s
    return np.where(ends > t_switch + 1e-9, high, low)


def test_runaway_onset_at_the_known_crossing() -> None:
    """2 Hz until 3 s, then 20 Hz; 0.5 s moving average crosses 10 Hz when the window holds
    n high bins with (2 (50 - n) + 20 n) / 50 >= 10, i.e. n >= 22.2 -> 23 bins -> t = 3.23 s [derived]."""
    bin_s = 0.01
    rate = _step_trace(2.0, 20.0, 3.0, 8.0, bin_s)
    n_high = int(np.ceil((10.0 - 2.0) * 50 / (20.0 - 2.0)))
    onset = metrics.runaway_onset(rate, bin_s, 0.5, 10.0, 1.0, np.zeros(len(rate), dtype=bool), 1.0)
    assert onset == pytest.approx(3.0 + n_high * bin_s)


def test_runaway_onset_needs_the_hold_and_ignores_cue_bins() -> None:
    bin_s = 0.01
    # a 0.8 s excursion to 20 Hz is shorter than the 1 s hold: no onset
    rate = _step_trace(2.0, 20.0, 3.0, 8.0, bin_s)
    rate[380:] = 2.0
    none = np.zeros(len(rate), dtype=bool)
    assert np.isnan(metrics.runaway_onset(rate, bin_s, 0.5, 10.0, 1.0, none, 1.0))
    # a long 50 Hz period that is entirely a cue window is excluded
    cue = np.zeros(len(rate), dtype=bool)
    cue[300:500] = True
    rate[300:500] = 50.0
    assert np.isnan(metrics.runaway_onset(rate, bin_s, 0.5, 10.0, 1.0, cue, 1.0))
    assert metrics.runaway_onset(rate, bin_s, 0.5, 10.0, 1.0, none, 1.0) < 3.5


def test_runaway_and_active_thresholds_use_factor_or_floor() -> None:
    det = {"runaway_factor": 4.0, "runaway_floor_hz": 10.0, "active_factor": 3.0, "active_floor_hz": 5.0}
    assert metrics.runaway_threshold(det, 3.0) == 12.0
    assert metrics.runaway_threshold(det, 1.0) == 10.0
    assert metrics.runaway_threshold(det, float("nan")) == 10.0
    assert metrics.active_threshold(det, 2.0) == 6.0
    assert metrics.active_threshold(det, 1.0) == 5.0


def test_isi_cv_regular_zero_and_poisson_one() -> None:
    """CV of a regular train is 0; of a Poisson train 1 (exponential ISIs) [common practice]."""
    regular = np.arange(0.0, 10.0, 0.05)
    assert metrics.isi_cv(regular, np.zeros(len(regular), dtype=int), 0.0, 10.0) == pytest.approx(0.0, abs=1e-9)
    rng = np.random.default_rng(7)
    poisson = np.cumsum(rng.exponential(0.1, 20000))
    cv = metrics.isi_cv(poisson, np.zeros(len(poisson), dtype=int), 0.0, poisson[-1] + 1)
    assert cv == pytest.approx(1.0, abs=0.03)  # standard error of the CV over 2e4 ISIs ~0.007


def test_weight_correlation_and_assembly_contrast() -> None:
    rng = np.random.default_rng(3)
    w0 = rng.random(200)
    w1 = w0 + rng.normal(0, 0.1, 200)
    assert metrics.weight_correlation(w1, w0) == pytest.approx(pearsonr(w1, w0)[0])
    within = np.zeros(6, dtype=bool)
    within[:2] = True
    w = np.array([0.25, 0.35, 0.05, 0.05, 0.04, 0.06])
    assert metrics.assembly_contrast(w, within) == pytest.approx(0.30 / 0.05)


def test_outcome_labels() -> None:
    nan = float("nan")
    assert metrics.outcome(7.5, 20.0, 20.0, 0.1) == "runaway"
    assert metrics.outcome(nan, 0.05, 3.0, 0.1) == "silent"
    assert metrics.outcome(nan, 3.0, 0.05, 0.1) == "silent"  # fell silent during recall
    assert metrics.outcome(nan, 3.0, 3.0, 0.1) == "stable"
    assert metrics.outcome(nan, 3.0, nan, 0.1) == "stable"  # the tail was not reached: not silent
