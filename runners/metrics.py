"""Point metrics: pure numpy over spike times (s), cell indices and weights. No Brian2 here.

Conventions: times in seconds, rates in Hz, windows half-open ``[t0, t1)``. A rate trace is a
1-D array of population rates (Hz per cell) in consecutive bins of ``bin_s`` seconds starting at
t = 0; the value of bin ``b`` belongs to time ``(b + 1) * bin_s`` (its end) once smoothed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..flags import ALREADY_ACTIVE, NOT_RECALLED, RECALLED, RUNAWAY, SILENT, STABLE


def window_counts(times: np.ndarray, cells: np.ndarray, n_cells: int, t0: float, t1: float) -> np.ndarray:
    """Spike count of each of ``n_cells`` cells in ``[t0, t1)`` (s)."""
    sel = (times >= t0) & (times < t1)
    return np.bincount(cells[sel], minlength=n_cells).astype(float)


def mean_rate(times: np.ndarray, n_cells: int, t0: float, t1: float) -> float:
    """Mean rate per cell (Hz) over ``[t0, t1)``; NaN for an empty window."""
    if t1 <= t0 or n_cells == 0:
        return float("nan")
    return float(np.count_nonzero((times >= t0) & (times < t1)) / (n_cells * (t1 - t0)))


def binned_rate(times: np.ndarray, n_cells: int, bin_s: float, duration_s: float) -> np.ndarray:
    """Population rate (Hz per cell) in bins of ``bin_s`` s covering ``[0, duration_s)``.

    Spike times on a bin edge (up to float rounding, 1e-6 of a bin) count in the later bin.
    A last, partial bin is divided by its actual length.
    """
    n_bins = int(np.ceil(duration_s / bin_s - 1e-9))
    index = np.floor(np.asarray(times) / bin_s + 1e-6).astype(int)
    counts = np.bincount(index[index < n_bins], minlength=n_bins)
    edges = np.minimum(np.arange(n_bins + 1) * bin_s, duration_s)
    return counts / (n_cells * np.diff(edges))


def smoothed_rate(rate_hz: np.ndarray, bin_s: float, window_s: float, exclude: np.ndarray) -> np.ndarray:
    """Causal moving average (Hz) of a rate trace over ``window_s`` s, skipping excluded bins.

    Entry ``b`` averages the bins in ``((b + 1) * bin_s - window_s, (b + 1) * bin_s]`` that are
    not excluded; NaN where every bin of the window is excluded.
    """
    width = max(int(round(window_s / bin_s)), 1)
    keep = ~exclude
    kernel = np.ones(width)
    total = np.convolve(np.where(keep, rate_hz, 0.0), kernel)[: len(rate_hz)]
    count = np.convolve(keep.astype(float), kernel)[: len(rate_hz)]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def threshold_above_baseline(baseline_hz: float, factor: float, floor_hz: float) -> float:
    """A rate threshold (Hz) relative to a baseline: ``max(factor * baseline, floor)``; the floor if baseline is NaN."""
    return float(floor_hz) if not np.isfinite(baseline_hz) else float(max(factor * baseline_hz, floor_hz))


def runaway_threshold(det: dict, baseline_hz: float) -> float:
    """Runaway threshold (Hz) of ``[detection]`` settings: runaway_factor x baseline, at least runaway_floor_hz."""
    return threshold_above_baseline(baseline_hz, det["runaway_factor"], det["runaway_floor_hz"])


def active_threshold(det: dict, baseline_hz: float) -> float:
    """Rate (Hz) above which a cell counts as active: active_factor x baseline, at least active_floor_hz."""
    return threshold_above_baseline(baseline_hz, det["active_factor"], det["active_floor_hz"])


def runaway_onset(rate_hz: np.ndarray, bin_s: float, window_s: float, threshold_hz: float,
                  hold_s: float, exclude: np.ndarray, start_s: float) -> float:
    """First time (s) at which the smoothed rate is above threshold and stays there for ``hold_s``.

    Candidate times are bin ends ``(b + 1) * bin_s >= start_s`` of bins not excluded (cue
    periods). The smoothed rate (see :func:`smoothed_rate`) must be ``>= threshold_hz`` at the
    candidate and at every non-excluded bin end up to ``hold_s`` later, and the trace must reach
    that far. NaN if no such time.
    """
    smooth = smoothed_rate(rate_hz, bin_s, window_s, exclude)
    ends = (np.arange(len(rate_hz)) + 1) * bin_s
    valid = ~exclude & np.isfinite(smooth)
    low = valid & (smooth < threshold_hz)
    hold_bins = int(round(hold_s / bin_s))
    idx = np.arange(len(rate_hz))
    next_low = np.minimum.accumulate(np.where(low, idx, len(rate_hz))[::-1])[::-1]
    ok = valid & ~low & (ends >= start_s - 1e-9) & (idx + hold_bins < len(rate_hz)) & (next_low > idx + hold_bins)
    if ok.any():
        return float(ends[np.argmax(ok)])
    return float("nan")


def isi_cv(times: np.ndarray, cells: np.ndarray, t0: float, t1: float) -> float:
    """Mean ISI coefficient of variation (std/mean of intervals) over cells with >= 3 spikes in ``[t0, t1)``.

    NaN if no cell has 3 spikes.
    """
    sel = (times >= t0) & (times < t1)
    order = np.lexsort((times[sel], cells[sel]))
    t, c = times[sel][order], cells[sel][order]
    cvs = []
    for cell in np.unique(c):
        isi = np.diff(t[c == cell])
        if len(isi) >= 2 and isi.mean() > 0:
            cvs.append(isi.std() / isi.mean())
    return float(np.mean(cvs)) if cvs else float("nan")


def _pearson(x: np.ndarray, y: np.ndarray) -> float:
    if len(x) < 2 or np.ptp(x) == 0 or np.ptp(y) == 0:
        return float("nan")
    return float(np.corrcoef(x, y)[0, 1])


def recall_quality(counts: np.ndarray, members: np.ndarray, cued: np.ndarray) -> float:
    """Pearson r, over cells not cued, between window spike count and membership (boolean masks).

    NaN when counts or membership are constant over those cells (e.g. no spikes at all).
    """
    uncued = ~cued
    return _pearson(counts[uncued], members[uncued].astype(float))


def recall_score(counts: np.ndarray, members: np.ndarray, cued: np.ndarray) -> float:
    """Overlap of the uncued cells' activity with an assembly, normalised by coding level.

    The overlap of Amit, Gutfreund & Sompolinsky (1985, Phys Rev Lett 55:1530) on rates,
    ``m = sum_i (xi_i - a) r_i / (N a (1 - a) rbar_members)`` over the N cells not cued, with
    ``xi`` the membership, ``a`` the fraction of members among them and ``rbar_members`` the
    members' mean rate. It reduces to ``1 - rbar_others / rbar_members``: 1 = only members fire
    (perfect completion), 0 = members fire like everyone else (chance), whatever the network size
    or coding level. ``counts`` are spike counts of one window (rates up to a common factor).
    NaN when members or non-members are absent among the uncued cells, or the members are silent.
    """
    pool = ~cued
    xi, r = members[pool], counts[pool]
    if not xi.any() or xi.all() or r[xi].mean() == 0:
        return float("nan")
    a = xi.mean()
    return float(np.sum((xi - a) * r) / (len(r) * a * (1 - a) * r[xi].mean()))


def rate_contrast(counts: np.ndarray, members: np.ndarray, cued: np.ndarray) -> float:
    """Mean count of uncued members minus that of non-members, in units of the non-members' standard deviation.

    NaN when either group is empty or the non-members' counts do not vary.
    """
    pool = ~cued
    xi, r = members[pool], counts[pool]
    if not xi.any() or xi.all() or r[~xi].std() == 0:
        return float("nan")
    return float((r[xi].mean() - r[~xi].mean()) / r[~xi].std())


def completion(counts: np.ndarray, window_s: float, members: np.ndarray, cued: np.ndarray,
               active_hz: float) -> float:
    """Fraction of uncued members whose window rate (counts / window_s, Hz) exceeds ``active_hz``."""
    pool = members & ~cued
    return float(np.mean(counts[pool] / window_s > active_hz)) if pool.any() else float("nan")


def spurious(counts: np.ndarray, window_s: float, members: np.ndarray, active_hz: float) -> float:
    """Fraction of non-member cells whose window rate (Hz) exceeds ``active_hz``."""
    pool = ~members
    return float(np.mean(counts[pool] / window_s > active_hz)) if pool.any() else float("nan")


def cross_talk(counts: np.ndarray, memberships: np.ndarray, k: int) -> float:
    """Largest recall score of any assembly j != k, over the cells outside assembly k, while k is cued.

    ``memberships`` is a boolean (count, n_cells) matrix. Cells of k (cued or shared with j) are
    left out, so overlap between assemblies does not count as cross-talk. NaN with a single
    assembly.
    """
    outside = memberships[k]
    others = [recall_score(counts, memberships[j], outside) for j in range(len(memberships)) if j != k]
    return float(np.nanmax(others)) if others and not np.all(np.isnan(others)) else float("nan")


def subset_sums(values: np.ndarray, size: int, draws: int, rng: np.random.Generator) -> np.ndarray:
    """Sums of ``draws`` random subsets of ``size`` entries of ``values``, each drawn without replacement.

    A subset is the ``size`` smallest of one uniform key per entry (every subset equally likely);
    keys are drawn in blocks of about 2**20 so memory stays bounded for large networks.
    """
    block = max(1, 2**20 // max(len(values), 1))
    sums = []
    for start in range(0, draws, block):
        keys = rng.random((min(block, draws - start), len(values)))
        sums.append(values[np.argpartition(keys, size - 1, axis=1)[:, :size]].sum(axis=1))
    return np.concatenate(sums) if sums else np.zeros(0, dtype=values.dtype)


def randomised_p(observed: float, null: np.ndarray, u: float) -> float:
    """Upper-tail Monte Carlo p-value with ties broken at random: ``(b + u (t + 1)) / (n + 1)``.

    ``b`` null values above ``observed``, ``t`` equal to it, ``n`` in all, ``u`` uniform in [0, 1).
    Under exchangeability of the observed value with the null draws it is uniform on (0, 1), so
    ``p <= alpha`` has probability exactly alpha however many ties (silent cells) there are.
    """
    above = int(np.count_nonzero(null > observed))
    ties = int(np.count_nonzero(null == observed))
    return (above + u * (ties + 1)) / (len(null) + 1)


def uniform_in_spans(spans: list[tuple[float, float]], draws: int, rng: np.random.Generator) -> np.ndarray:
    """``draws`` times (s) drawn uniformly from the union of the intervals ``[lo, hi]`` in ``spans``.

    Empty without spans of positive length.
    """
    lows = np.array([lo for lo, hi in spans if hi > lo])
    lengths = np.array([hi - lo for lo, hi in spans if hi > lo])
    if not len(lengths):
        return np.zeros(0)
    position = rng.random(draws) * lengths.sum()
    ends = np.cumsum(lengths)
    which = np.minimum(np.searchsorted(ends, position, side="right"), len(ends) - 1)
    return lows[which] + position - (ends[which] - lengths[which])


def shifted_differences(times: np.ndarray, starts: np.ndarray, recall: tuple[float, float],
                        pre: tuple[float, float]) -> np.ndarray:
    """Spike count in the recall window minus that in the pre-cue window, for windows placed at each of ``starts``.

    ``times``: sorted spike times (s) of a set of cells, pooled; ``recall``/``pre``: window
    ``[t0, t1)`` offsets (s) from a cue start. Integer counts, so ties are exact.
    """
    def count(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        return np.searchsorted(times, hi, side="left") - np.searchsorted(times, lo, side="left")

    return count(starts + recall[0], starts + recall[1]) - count(starts + pre[0], starts + pre[1])


@dataclass(frozen=True)
class RecallTest:
    """The recall test of one assembly in one cue (see :func:`recall_test`)."""

    evoked_hz: float  # mean over uncued members of (rate in the recall window - rate in the pre-cue window)
    p_cells: float  # against pseudo-assemblies of uncued cells; NaN without uncued members or other uncued cells
    p_times: float  # against the same cells at background times; NaN without background times
    z: float  # (evoked - pseudo-assembly mean) / pseudo-assembly standard deviation; NaN if those do not vary
    precue_rate_hz: float  # mean rate of all members in the pre-cue window
    state: str  # capsweep.flags.RECALL_STATES

    @property
    def p_value(self) -> float:
        """The test's p-value: the larger of the two (both nulls must be beaten); NaN if either is NaN."""
        return float(max(self.p_cells, self.p_times)) if np.isfinite([self.p_cells, self.p_times]).all() \
            else float("nan")


def recall_test(during: np.ndarray, before: np.ndarray, window_s: float, members: np.ndarray, cued: np.ndarray,
                shifted: np.ndarray, rng: np.random.Generator, active_hz: float, alpha: float) -> RecallTest:
    """Evoked completion of one assembly against two nulls: other cells, and the same cells at other times.

    ``during``/``before``: spike counts of every E cell in the recall window and in the pre-cue
    window, both ``window_s`` s long; ``members``/``cued``: boolean masks. The statistic is the
    sum over uncued members of (count during - count before). Null of cells: ``len(shifted)``
    sets of as many cells, drawn without replacement from every cell not cued (uncued members
    and the rest, so that the observed set is one the null can draw: an exact permutation test),
    scored alike. Null of times: ``shifted``, the same statistic of the same cells with both
    windows moved to background times (:func:`shifted_differences`). Each gives a randomised
    p-value (:func:`randomised_p`, ``u`` drawn from ``rng``); recalled when both are at most
    ``alpha``. Already active when the members' mean rate in the pre-cue window exceeds
    ``active_hz`` (then never recalled).
    """
    diff = np.rint(during - before).astype(np.int64)
    target, pool = members & ~cued, ~cued
    size = int(np.count_nonzero(target))
    precue = float(before[members].mean() / window_s) if members.any() else float("nan")
    active = bool(precue > active_hz)
    nan = float("nan")
    if size == 0 or size == int(np.count_nonzero(pool)) or not len(shifted):
        return RecallTest(nan, nan, nan, nan, precue, ALREADY_ACTIVE if active else NOT_RECALLED)
    observed = int(diff[target].sum())
    null = subset_sums(diff[pool], size, len(shifted), rng)
    p_cells = randomised_p(observed, null, float(rng.random()))
    p_times = randomised_p(observed, shifted, float(rng.random()))
    spread = float(null.std())
    z = (observed - float(null.mean())) / spread if spread > 0 else nan
    state = ALREADY_ACTIVE if active else RECALLED if max(p_cells, p_times) <= alpha else NOT_RECALLED
    return RecallTest(observed / (size * window_s), p_cells, p_times, z, precue, state)


def weight_correlation(w: np.ndarray, w0: np.ndarray) -> float:
    """Pearson r between two weight vectors over the same synapses (NaN if either is constant)."""
    return _pearson(w, w0)


def assembly_contrast(w: np.ndarray, within: np.ndarray) -> float:
    """Mean within-assembly weight / mean of the other weights (``within`` is a boolean mask)."""
    if not within.any() or within.all():
        return float("nan")
    other = w[~within].mean()
    return float(w[within].mean() / other) if other > 0 else float("nan")


def outcome(onset_s: float, rate_before_recall_hz: float, rate_after_recall_hz: float, silence_hz: float) -> str:
    """'runaway' if an onset was found, else 'silent' if the E rate (Hz) before or after recall is below
    silence_hz, else 'stable'.

    A NaN rate (a phase the run did not reach) does not count as silent.
    """
    if np.isfinite(onset_s):
        return RUNAWAY
    rates = (rate_before_recall_hz, rate_after_recall_hz)
    return SILENT if any(np.isfinite(r) and r < silence_hz for r in rates) else STABLE


def synapse_classes(pre: np.ndarray, post: np.ndarray, members: np.ndarray) -> dict[str, np.ndarray]:
    """Boolean masks over E->E synapses by the assemblies of their cells; the five partition the synapses.

    ``pre``/``post`` are the synapses' cell indices, ``members`` a boolean (count, n_cells)
    membership matrix. "within": pre and post share an assembly; "between": pre and post are
    each in some assembly but share none; "in": post in some assembly, pre in none; "out": the
    reverse; "background": neither in any.
    """
    in_any = np.asarray(members.any(axis=0))
    within = (members[:, pre] & members[:, post]).any(axis=0)
    return {"within": within, "between": in_any[pre] & in_any[post] & ~within,
            "in": in_any[post] & ~in_any[pre], "out": in_any[pre] & ~in_any[post],
            "background": ~in_any[pre] & ~in_any[post]}


def mean_over(values: np.ndarray, mask: np.ndarray) -> float:
    """Mean of ``values`` where ``mask`` holds; NaN for an empty mask."""
    return float(values[mask].mean()) if mask.any() else float("nan")


def pathway_means(w: np.ndarray, pre: np.ndarray, post: np.ndarray, members: np.ndarray) -> tuple[float, float, float]:
    """Mean E->E weight (g_leak) into members from non-members, out of members to non-members, and within members.

    The "in", "out" and "within" classes of :func:`synapse_classes`; NaN for an empty pathway.
    """
    classes = synapse_classes(pre, post, members)
    into_w, out_w, within_w = (mean_over(w, classes[name]) for name in ("in", "out", "within"))
    return into_w, out_w, within_w


def upper_share(w_ref: np.ndarray, mask: np.ndarray, upper_weight: float) -> float:
    """Fraction of the synapses in ``mask`` whose reference weight lies in the upper state of the bistable
    consolidation: w_ref > w_P / 2, the unstable point between its stable states 0 and w_P = ``upper_weight``
    (g_leak). NaN for an empty mask."""
    return mean_over(w_ref > upper_weight / 2, mask)
