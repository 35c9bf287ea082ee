"""The one registry of model-config keys: default, unit, allowed range, description.

Every key a sweep file may set under ``[network]``, ``[assemblies]``, ``[plasticity.*]``,
``[protocol]``, ``[detection]`` and ``[execution]`` is declared here and nowhere else.
Units live in the key names (``_ms``, ``_s``, ``_hz``, ``_mv``); weights are in units of
the leak conductance (``g_leak``), which makes them dimensionless.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from .clusters import LOCAL
from .clusters import NAMES as CLUSTER_KINDS
from .engines import ENGINES, NAMES
from .errors import ConfigError


@dataclass(frozen=True)
class Key:
    """One config key: where it lives, its default and what values it accepts."""

    path: str
    default: Any
    unit: str
    description: str
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] = ()
    sweepable: bool = True
    plausible: tuple[float, float] | None = None  # overrides the range PLAUSIBLE_BY_SUFFIX gives the key's unit

    @property
    def kind(self) -> type:
        """Python type of the value (bool, int, float, str, or tuple for a list of numbers)."""
        return type(self.default)

    @property
    def shown_unit(self) -> str:
        """The unit as shown to users: empty for dimensionless values (unit "1")."""
        return "" if self.unit == DIMENSIONLESS else self.unit

    @property
    def plausible_range(self) -> tuple[float, float] | None:
        """Values outside this range are allowed but look like a unit slip (same unit as the key).

        None when the key has no such range or when the allowed range already lies within it.
        """
        span = self.plausible or next((r for suffix, r in PLAUSIBLE_BY_SUFFIX.items() if self.path.endswith(suffix)),
                                      None)
        if span is None:
            return None
        narrower = self.low is None or span[0] > self.low or self.high is None or span[1] < self.high
        return span if narrower else None

    def implausible(self, value: Any, where: str = "") -> str | None:
        """A one-line warning if a checked ``value`` (or an item of it) lies outside the plausible range, else None."""
        span = self.plausible_range
        items = value if isinstance(value, tuple) else (value,)
        if span is None or all(span[0] <= v <= span[1] for v in items):
            return None
        place = f" in {where}" if where else ""
        unit = f" {self.shown_unit}" if self.shown_unit else ""
        return (f"{self.path} = {_shown(value)}{place} is outside the plausible range {span[0]:g} to {span[1]:g}{unit}"
                " (a unit slip?)")

    def allowed(self) -> str:
        """Human-readable statement of what values this key accepts."""
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        if self.kind is bool:
            return "true or false"
        kind = {int: "an integer", float: "a number", str: "a string",
                tuple: "an increasing list of numbers, each"}[self.kind]
        if self.low is not None and self.high is not None:
            return f"{kind} from {self.low:g} to {self.high:g}"
        if self.low is not None:
            return f"{kind} >= {self.low:g}"
        return kind

    def check(self, value: Any, where: str = "") -> Any:
        """Return ``value`` coerced to this key's type, or raise ConfigError naming the key."""
        place = f" in {where}" if where else ""
        unit = f" ({self.shown_unit})" if self.shown_unit else ""
        bad = ConfigError(
            f"{self.path} = {value!r}{place} is not allowed: expected {self.allowed()}{unit}. {self.description}."
        )
        if self.kind is bool:
            if not isinstance(value, bool):
                raise bad
            return value
        if isinstance(value, bool):
            raise bad
        if self.kind is tuple:
            return self._check_list(value, bad)
        if self.kind is int:
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            if not isinstance(value, int):
                raise bad
        elif self.kind is float:
            return self.check_number(value, bad)
        elif not isinstance(value, str):
            raise bad
        if self.choices and value not in self.choices:
            raise bad
        if self.low is not None and value < self.low:
            raise bad
        if self.high is not None and value > self.high:
            raise bad
        return value

    def _check_list(self, value: Any, bad: ConfigError) -> tuple[float, ...]:
        """A list key's value as a tuple of floats, each in range and increasing; ``bad`` otherwise."""
        if not isinstance(value, (list, tuple)):
            raise bad
        items = tuple(self.check_number(v, bad) for v in value)
        if any(b <= a for a, b in zip(items, items[1:])):
            raise bad
        return items

    def check_number(self, value: Any, bad: ConfigError) -> float:
        """One finite number within this key's range as a float; ``bad`` otherwise."""
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise bad
        if (self.low is not None and value < self.low) or (self.high is not None and value > self.high):
            raise bad
        return float(value)


def _k(path: str, default: Any, unit: str, description: str, **kw: Any) -> Key:
    return Key(path, default, unit, description, **kw)


def _shown(value: Any) -> str:
    """A checked value as written in a sweep file (a list key's tuple as a list)."""
    return repr(list(value)) if isinstance(value, tuple) else repr(value)


DIMENSIONLESS = "1"
"""The unit of counts, fractions, switches and choices (shown as no unit)."""
WEIGHT_UNIT = "g_leak"
"""Weights are multiples of the leak conductance: dimensionless numbers on this scale."""


def cf_unit(unit: str) -> str:
    """``unit`` as a store records it, a string UDUNITS and pint parse: one relative to g_leak is the number "1"."""
    return DIMENSIONLESS if WEIGHT_UNIT in unit else unit


def relative_scale(unit: str) -> str:
    """The scale a dimensionless stored value of ``unit`` is relative to ('' for a unit stored as it is)."""
    return unit if cf_unit(unit) != unit else ""


def in_units_of(scale: str) -> str:
    """The suffix of a long name that names the scale of a dimensionless value ('' for no scale)."""
    return f" (in units of {scale}; g_leak: the leak conductance)" if scale else ""

PLAUSIBLE_BY_SUFFIX: dict[str, tuple[float, float]] = {
    "_hz": (0.0, 1000.0),
    "_ms": (0.0, 10_000.0),
    "_s": (0.0, 3600.0),
}
"""Plausible range of a value by its key's unit suffix: beyond it, a value is more likely a unit slip than meant."""


class ImplausibleValue(UserWarning):
    """A sweep-file value is allowed but outside its key's plausible range (a warning, never an error)."""


KEYS: tuple[Key, ...] = (
    # --- network: sizes, connectivity, neuron model, background drive
    _k("network.n_exc", 800, "1", "Number of excitatory cells", low=20, high=50000),
    _k("network.inh_per_exc", 0.25, "1", "Inhibitory cells per excitatory cell", low=0.01, high=2.0),
    _k("network.indegree_exc", 80, "1", "Excitatory inputs per cell (fixed in-degree)", low=1, high=10000),
    _k("network.indegree_inh", 20, "1", "Inhibitory inputs per cell (fixed in-degree)", low=1, high=10000),
    _k("network.delay_ms", 1.5, "ms", "Synaptic delay", low=0.1, high=20.0),
    _k("network.tau_m_ms", 20.0, "ms", "Membrane time constant", low=1.0, high=200.0),
    _k("network.e_leak_mv", -70.0, "mV", "Leak reversal potential", low=-100.0, high=-30.0),
    _k("network.v_threshold_mv", -50.0, "mV", "Spike threshold", low=-80.0, high=0.0),
    _k("network.v_reset_mv", -60.0, "mV", "Reset potential", low=-100.0, high=-30.0),
    _k("network.refractory_exc_ms", 5.0, "ms", "Excitatory refractory period", low=0.0, high=50.0),
    _k("network.refractory_inh_ms", 2.0, "ms", "Inhibitory refractory period", low=0.0, high=50.0),
    _k("network.e_exc_mv", 0.0, "mV", "Excitatory reversal potential", low=-30.0, high=50.0),
    _k("network.e_inh_mv", -80.0, "mV", "Inhibitory reversal potential", low=-120.0, high=-50.0),
    _k("network.tau_exc_ms", 5.0, "ms", "Excitatory conductance decay", low=0.5, high=100.0),
    _k("network.tau_inh_ms", 10.0, "ms", "Inhibitory conductance decay", low=0.5, high=100.0),
    _k("network.adapt_jump", 0.0, "g_leak", "Adaptation conductance jump per spike (0 = no adaptation)",
       low=0.0, high=10.0),
    _k("network.adapt_tau_ms", 100.0, "ms", "Adaptation conductance decay", low=1.0, high=5000.0),
    _k("network.w_e_to_e", 0.05, "g_leak", "Initial E->E weight", low=0.0, high=10.0),
    _k("network.w_e_to_i", 0.10, "g_leak", "E->I weight", low=0.0, high=10.0),
    _k("network.w_i_to_e", 0.90, "g_leak", "Initial I->E weight", low=0.0, high=50.0),
    _k("network.w_i_to_i", 0.30, "g_leak", "I->I weight", low=0.0, high=50.0),
    _k("network.drive_inputs", 100, "1", "Poisson background inputs per cell", low=0, high=100000),
    _k("network.drive_weight", 0.06, "g_leak", "Weight of each background input", low=0.0, high=10.0),
    _k("network.drive_rate_exc_hz", 18.0, "Hz", "Background rate per input onto E cells", low=0.0, high=1000.0),
    _k("network.drive_rate_inh_hz", 13.0, "Hz", "Background rate per input onto I cells", low=0.0, high=1000.0),
    _k("network.dt_ms", 0.1, "ms", "Integration time step (Euler)", low=0.005, high=1.0, sweepable=False),
    # --- assemblies
    _k("assemblies.count", 4, "1", "Number of cell assemblies", low=0, high=1000),
    _k("assemblies.size", 120, "1", "Excitatory cells per assembly", low=2, high=50000),
    _k("assemblies.coding_level", 0.0, "1",
       "Assembly size as a fraction of network.n_exc, rounded (0 = use assemblies.size); keeps the coding level "
       "fixed when the network size is swept", low=0.0, high=1.0),
    _k("assemblies.overlap", "disjoint", "1", "Membership policy: disjoint groups or independent random draws",
       choices=("disjoint", "random")),
    _k("assemblies.imprint", "prewired", "1", "How assemblies come to exist",
       choices=("prewired", "learned")),
    _k("assemblies.prewire_gain", 5.0, "1", "Within-assembly E->E weight as a multiple of w_e_to_e (prewired)",
       low=0.0, high=100.0),
    # --- plasticity: every term switchable, every coefficient sweepable
    _k("plasticity.freeze_after_imprint", False, "1",
       "Stop every weight change at the end of imprinting (of settle, for prewired assemblies): the control that "
       "shows what ongoing plasticity does"),
    _k("plasticity.triplet.enabled", True, "1", "Minimal triplet STDP on E->E"),
    _k("plasticity.triplet.a_ltp", 0.02, "g_leak", "Triplet LTP amplitude A", low=0.0, high=1.0),
    _k("plasticity.triplet.b_ltd", 0.004, "g_leak", "Pair LTD amplitude B", low=0.0, high=1.0),
    _k("plasticity.triplet.tau_plus_ms", 16.8, "ms", "Presynaptic trace decay", low=0.1, high=1000.0),
    _k("plasticity.triplet.tau_minus_ms", 33.7, "ms", "Postsynaptic trace decay", low=0.1, high=1000.0),
    _k("plasticity.triplet.tau_slow_ms", 100.0, "ms", "Slow postsynaptic trace decay", low=0.1, high=10000.0),
    _k("plasticity.triplet.w_max", 0.5, "g_leak", "Upper clip of E->E weights", low=0.0, high=100.0),
    _k("plasticity.heterosynaptic.enabled", True, "1", "Heterosynaptic term on E->E"),
    _k("plasticity.heterosynaptic.beta", 0.03, "1", "Heterosynaptic coefficient beta", low=0.0, high=10.0),
    _k("plasticity.heterosynaptic.w_ref_mode", "fixed", "1",
       "Reference weight: fixed at the initial weight, consolidating (relaxes toward the weight), or bistable "
       "(consolidates into one of two stable states, Zenke, Agnes & Gerstner 2015)",
       choices=("fixed", "consolidating", "bistable")),
    _k("plasticity.heterosynaptic.w_ref_start", "initial", "1",
       "Starting value of the reference weight: the synapse's initial weight, or the lower stable state 0 as in the "
       "published bistable consolidation (Ziegler, Zenke, Kastner & Gerstner 2015, J Neurosci 35:1319)",
       choices=("initial", "lower")),
    _k("plasticity.heterosynaptic.tau_consolidation_s", 1200.0, "s",
       "Time constant of the consolidating or bistable reference weight",
       low=0.1, high=1e6),
    _k("plasticity.heterosynaptic.bistable_strength", 80.0, "1/g_leak^2",
       "Strength P of the bistable term of the reference weight (w_ref_mode = 'bistable'; 0 = linear relaxation); "
       "default 80 keeps P w_P^2 = 5 as the published P = 20, w_P = 0.5", low=0.0, high=1e6),
    _k("plasticity.heterosynaptic.bistable_upper_weight", 0.25, "g_leak",
       "Upper stable state w_P of the bistable reference weight (lower state 0, unstable point w_P/2); default "
       "half the default triplet w_max, i.e. the prewired within-assembly weight", low=0.001, high=100.0),
    _k("plasticity.transmitter.enabled", True, "1", "Transmitter-induced term on E->E"),
    _k("plasticity.transmitter.delta", 1e-4, "g_leak", "Weight increment per presynaptic spike", low=0.0, high=1.0),
    _k("plasticity.inhibitory.enabled", True, "1", "Inhibitory STDP on I->E"),
    _k("plasticity.inhibitory.eta", 5e-3, "g_leak", "Inhibitory learning rate", low=0.0, high=1.0),
    _k("plasticity.inhibitory.rho0_hz", 3.0, "Hz", "Target excitatory rate", low=0.0, high=200.0),
    _k("plasticity.inhibitory.tau_ms", 20.0, "ms", "Inhibitory STDP trace decay", low=0.1, high=1000.0),
    _k("plasticity.inhibitory.w_max", 3.0, "g_leak", "Upper clip of I->E weights", low=0.0, high=100.0),
    # --- protocol (plasticity stays on in every phase)
    _k("protocol.settle_s", 1.0, "s", "Settle phase duration", low=0.0, high=1e5),
    _k("protocol.imprint_rate_hz", 600.0, "Hz", "Extra Poisson rate onto members while imprinting (learned)",
       low=0.0, high=1e5, plausible=(0.0, 1e4)),
    _k("protocol.imprint_weight", 0.1, "g_leak", "Weight of the imprinting input", low=0.0, high=10.0),
    _k("protocol.imprint_on_s", 1.0, "s", "Stimulus on-time per presentation (learned)", low=0.001, high=1e4),
    _k("protocol.imprint_off_s", 1.0, "s", "Pause after each presentation (learned)", low=0.0, high=1e4),
    _k("protocol.imprint_repeats", 4, "1", "Presentations per assembly (learned)", low=1, high=10000),
    _k("protocol.imprint_order", "interleaved", "1",
       "Order of the presentations (learned): interleaved (rounds of every assembly in turn) or blocked (all of one "
       "assembly's presentations, then a recall test of every assembly learned so far, then the next: recall by "
       "memory age)", choices=("interleaved", "blocked")),
    _k("protocol.hold_s", 10.0, "s", "Hold phase: background only, plasticity on", low=0.0, high=1e6),
    _k("protocol.retention_delays_s", (), "s",
       "Delays after hold start of recall tests during the hold (each cues every assembly); the final test after the "
       "hold is always made", low=0.0, high=1e6, sweepable=False),
    _k("protocol.retention_design", "repeated", "1",
       "Which assemblies each recall test cues: every one in every test (repeated: earlier tests rehearse what later "
       "ones measure), each exactly once over the hold's tests and the final one (once), or only the final test, each "
       "delay its own point with its own simulation (separate: sweep protocol.hold_s; protocol.retention_delays_s "
       "must be empty)", choices=("repeated", "once", "separate")),
    _k("protocol.snapshots", 5, "1", "Weight snapshots spread over the hold phase", low=2, high=1000, sweepable=False),
    _k("protocol.cue_fraction", 0.5, "1", "Fraction of an assembly's members cued", low=0.01, high=1.0),
    _k("protocol.cue_duration_s", 0.2, "s", "Cue duration", low=0.01, high=100.0),
    _k("protocol.cue_rate_hz", 2000.0, "Hz", "Extra Poisson rate onto cued cells", low=0.0, high=1e5,
       plausible=(0.0, 1e4)),
    _k("protocol.cue_weight", 0.1, "g_leak", "Weight of the cue input", low=0.0, high=10.0),
    _k("protocol.cue_gap_s", 0.5, "s", "Background-only gap after each cue", low=0.05, high=100.0),
    _k("protocol.cue_skip_s", 0.02, "s", "Start of the cue period left out of the recall window", low=0.0, high=10.0),
    _k("protocol.persistence_window_s", 0.1, "s", "Window after cue end scored as persistence", low=0.01, high=100.0),
    # --- detection
    _k("detection.smoothing_s", 0.5, "s", "Window of the smoothed excitatory rate", low=0.01, high=100.0),
    _k("detection.runaway_factor", 4.0, "1", "Runaway threshold as a multiple of the baseline E rate",
       low=1.0, high=1000.0),
    _k("detection.runaway_floor_hz", 10.0, "Hz", "Lowest runaway threshold", low=0.0, high=1000.0),
    _k("detection.runaway_hold_s", 1.0, "s", "Time above threshold before runaway is declared", low=0.0, high=1000.0),
    _k("detection.silence_hz", 0.1, "Hz",
       "E rate (before recall, or in the tail after it) below which a point counts as silent", low=0.0, high=100.0),
    _k("detection.baseline_start_s", 0.2, "s",
       "Start of the baseline window, which ends with the settle phase (skips the start-up transient)",
       low=0.0, high=1e5),
    _k("detection.recall_threshold", 0.5, "1",
       "Overlap recall score (normalised by coding level: 1 = perfect completion, 0 = chance) at or above which an "
       "assembly counts in overlap_recalled_count, the earlier rule kept for comparison (success uses the recall "
       "test)", low=-1.0, high=1.0),
    _k("detection.recall_mode", "cued", "1",
       "Window of the recall test and the overlap scores: while the cue is on (cued) or right after it (persistent)",
       choices=("cued", "persistent")),
    _k("detection.recall_alpha", 0.01, "1",
       "Per-test false-positive rate of the recall test: an assembly is recalled when its evoked completion beats "
       "both nulls (pseudo-assemblies, background times) at this p-value", low=1e-6, high=0.5),
    _k("detection.recall_null_draws", 1000, "1",
       "Draws of each of the recall test's two nulls (random sets of uncued cells; background times)",
       low=10, high=1_000_000),
    _k("detection.active_factor", 3.0, "1",
       "A cell is active when its window rate exceeds this multiple of the baseline E rate",
       low=1.0, high=1000.0),
    _k("detection.active_floor_hz", 5.0, "Hz", "Lowest rate that counts as active", low=0.0, high=1000.0),
    _k("detection.trace_bin_ms", 10.0, "ms", "Bin width of the stored population rate trace", low=0.1, high=10000.0,
       sweepable=False),
    # --- execution (never part of a point's identity)
    _k("execution.engine", "standalone", "1",
       "Brian2 engine: " + "; ".join(f"{e.name} ({e.summary})" for e in ENGINES.values()),
       choices=NAMES, sweepable=False),
    _k("execution.workers", 2, "1", "Local Dask worker processes", low=1, high=1024, sweepable=False),
    _k("execution.scheduler", "", "1", "Address of a running Dask scheduler ('' = start a local cluster)",
       sweepable=False),
    _k("execution.dashboard", False, "1",
       "Serve the Dask dashboard of the local cluster (its web server adds about 0.5 s to start-up)", sweepable=False),
    _k("execution.prescreen", False, "1",
       "Store the prescreen's predicted outcome (a fitted surrogate) beside each simulated one", sweepable=False),
    _k("execution.abort_on_runaway", True, "1", "Stop a point's simulation soon after runaway onset", sweepable=False),
    _k("execution.checkpoint_interval_s", 0.0, "s",
       "Simulated time between checkpoints of a point's full state, from which a killed point resumes with the same "
       "result (0 = off)", low=0.0, high=1e6, sweepable=False),
    _k("execution.threads", 1, "1",
       "Threads per point: OpenMP threads of the standalone binary (results depend on the count, which each point "
       "stores; the runtime engines run on one thread)", low=1, high=256, sweepable=False),
    _k("execution.cluster.kind", LOCAL, "1",
       "Where the Dask workers run: local processes (execution.workers), an existing scheduler (execution.scheduler), "
       "or batch jobs through dask-jobqueue (pip install 'capsweep[cluster]')",
       choices=CLUSTER_KINDS, sweepable=False),
    _k("execution.cluster.queue", "", "1", "Batch queue or partition of the worker jobs ('' = the system's default)",
       sweepable=False),
    _k("execution.cluster.account", "", "1", "Account or project the worker jobs are charged to ('' = none)",
       sweepable=False),
    _k("execution.cluster.cores", 1, "1", "Cores per batch job: one single-threaded worker process per core",
       low=1, high=256, sweepable=False),
    _k("execution.cluster.memory_gb", 2.0, "GB", "Memory per batch job, shared by its worker processes",
       low=0.1, high=4096.0, sweepable=False),
    _k("execution.cluster.walltime_min", 60.0, "min", "Wall time of each batch job", low=1.0, high=100000.0,
       sweepable=False),
    _k("execution.cluster.retire_min", 5.0, "min",
       "Workers retire gracefully between 1.5 and 0.5 times this before their job's wall time (staggered), "
       "and new jobs replace them while points remain; below execution.cluster.walltime_min / 1.5",
       low=0.1, high=100000.0, sweepable=False),
    _k("execution.cluster.max_jobs", 4, "1", "Most batch jobs at once; jobs are released as the sweep drains",
       low=1, high=10000, sweepable=False),
    _k("execution.cluster.directives", "", "1",
       "Extra job-script directives, separated by ';' (e.g. '--qos=short; --constraint=avx2')", sweepable=False),
    _k("execution.cluster.python", "", "1",
       "Python that starts the workers on the nodes ('' = the one running capsweep)", sweepable=False),
    _k("execution.cluster.scratch", "", "1",
       "Node-local directory for worker files and a per-node build cache ('' = the shared build cache, "
       "$CAPSWEEP_BUILD_DIR or ~/.cache/capsweep/builds)", sweepable=False),
    _k("execution.cluster.max_tries", 3, "1",
       "Workers a point may take down before it is recorded failed (a crash or memory exhaustion); "
       "local and batch clusters only", low=1, high=100, sweepable=False),
)

BY_PATH: dict[str, Key] = {k.path: k for k in KEYS}
SECTIONS: tuple[str, ...] = ("network", "assemblies", "plasticity", "protocol", "detection", "execution")


def defaults() -> dict[str, Any]:
    """Flat mapping ``dotted.path -> default`` of every key."""
    return {k.path: k.default for k in KEYS}


def closest(name: str, options: Iterable[str]) -> str | None:
    """The option most like a misspelt ``name``, or None when none is close (difflib ratio below 0.7)."""
    found = difflib.get_close_matches(name, list(options), n=1, cutoff=0.7)
    return found[0] if found else None


def did_you_mean(name: str, valid: Iterable[str], label: str = "valid keys") -> str:
    """'did you mean X?' for the valid name closest to a misspelt ``name``, else ``label: a, b, ...``."""
    valid = list(valid)
    match = closest(name, valid)
    return f"did you mean {match}?" if match else f"{label}: {', '.join(valid)}"


def lookup(path: str, where: str = "") -> Key:
    """Return the Key at ``path`` or raise ConfigError naming the closest key (or the valid keys near it)."""
    if path in BY_PATH:
        return BY_PATH[path]
    place = f" in {where}" if where else ""
    parent = next((p for p in _prefixes(path) if p in BY_PATH), None)
    if parent is not None:
        raise ConfigError(f"{parent}{place} must be a single value, not a table")
    table, _, leaf = path.rpartition(".")
    siblings = {p.rpartition(".")[2]: p for p in BY_PATH if p.rpartition(".")[0] == table}
    # Within a known table compare the last names only: the shared table prefix would make any name look close.
    match = siblings.get(closest(leaf, siblings) or "") if siblings else closest(path, BY_PATH)
    if match is not None:
        raise ConfigError(f"unknown key {path}{place}; did you mean {match}?")
    prefix = path
    valid: list[str] = []
    while not valid and "." in prefix:
        prefix = prefix.rsplit(".", 1)[0]
        valid = [p for p in BY_PATH if p.startswith(prefix + ".")]
    raise ConfigError(f"unknown key {path}{place}; valid keys here: {', '.join(valid or BY_PATH)}")


def nest(flat: dict[str, Any]) -> dict[str, Any]:
    """Turn ``{'a.b.c': v}`` into ``{'a': {'b': {'c': v}}}``."""
    tree: dict[str, Any] = {}
    for path, value in flat.items():
        node = tree
        *parents, leaf = path.split(".")
        for part in parents:
            node = node.setdefault(part, {})
        node[leaf] = value
    return tree


def flatten(tree: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """Inverse of :func:`nest`: ``{'a': {'b': v}}`` -> ``{'a.b': v}``; an empty table is kept as a value."""
    flat: dict[str, Any] = {}
    for key, value in tree.items():
        path = f"{prefix}{key}"
        flat.update(flatten(value, path + ".") if isinstance(value, dict) and value else {path: value})
    return flat


def _prefixes(path: str) -> list[str]:
    """``'a.b.c'`` -> ``['a', 'a.b']``."""
    parts = path.split(".")
    return [".".join(parts[:i]) for i in range(1, len(parts))]


def overlay(table: dict[str, Any], changes: dict[str, Any]) -> dict[str, Any]:
    """``table`` with the entries of ``changes`` that are not None put over it (a new dict)."""
    return {**table, **{k: v for k, v in changes.items() if v is not None}}


def with_execution(cfg: dict[str, Any], **changes: Any) -> dict[str, Any]:
    """Nested ``cfg`` with ``[execution]`` entries replaced by the ``changes`` that are not None."""
    return {**cfg, "execution": overlay(cfg["execution"], changes)}


def inhibitory_count(n_exc: int, inh_per_exc: float) -> int:
    """Number of inhibitory cells: ``round(n_exc * inh_per_exc)``, at least 1."""
    return max(1, int(round(n_exc * inh_per_exc)))


DERIVED_FROM: dict[str, tuple[str, ...]] = {"assemblies.size": ("assemblies.coding_level", "network.n_exc")}
"""Keys that :func:`resolve_derived` may fill in, with the keys their value is computed from."""


def resolve_derived(flat: dict[str, Any]) -> dict[str, Any]:
    """A flat config with the keys that other keys imply filled in (:data:`DERIVED_FROM`: assemblies.size from a
    coding level)."""
    level = flat["assemblies.coding_level"]
    return {**flat, "assemblies.size": int(round(level * flat["network.n_exc"]))} if level > 0 else flat
