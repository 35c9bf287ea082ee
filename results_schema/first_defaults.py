"""The defaults tables of the stores made before stores recorded theirs (store schemas up to 3.0).

Those stores hashed every key of their table into each point id with its value, whatever it was; ids keep
doing so (:func:`capsweep.sweeps.ids.id_entries`), so their ids stay valid. A store that records no table
(root attr ``identity_defaults``) was made under :data:`FIRST_DEFAULTS`. Stores of schema 2.0 and 2.1 had
two keys fewer (:data:`ADDED_IN_3_0`); the upgrade of such a store records their table
(:func:`schema_2_defaults`) and its keys as the ones its ids hash whole (root attr ``id_whole_keys``). Never
edit: a key added to the registry later enters ids only where it differs from its default.
"""

from __future__ import annotations

from typing import Any

FIRST_DEFAULTS: dict[str, Any] = {
    "assemblies.coding_level": 0.0,
    "assemblies.count": 4,
    "assemblies.imprint": "prewired",
    "assemblies.overlap": "disjoint",
    "assemblies.prewire_gain": 5.0,
    "assemblies.size": 120,
    "detection.active_factor": 3.0,
    "detection.active_floor_hz": 5.0,
    "detection.baseline_start_s": 0.2,
    "detection.recall_alpha": 0.01,
    "detection.recall_mode": "cued",
    "detection.recall_null_draws": 1000,
    "detection.recall_threshold": 0.5,
    "detection.runaway_factor": 4.0,
    "detection.runaway_floor_hz": 10.0,
    "detection.runaway_hold_s": 1.0,
    "detection.silence_hz": 0.1,
    "detection.smoothing_s": 0.5,
    "detection.trace_bin_ms": 10.0,
    "network.adapt_jump": 0.0,
    "network.adapt_tau_ms": 100.0,
    "network.delay_ms": 1.5,
    "network.drive_inputs": 100,
    "network.drive_rate_exc_hz": 18.0,
    "network.drive_rate_inh_hz": 13.0,
    "network.drive_weight": 0.06,
    "network.dt_ms": 0.1,
    "network.e_exc_mv": 0.0,
    "network.e_inh_mv": -80.0,
    "network.e_leak_mv": -70.0,
    "network.indegree_exc": 80,
    "network.indegree_inh": 20,
    "network.inh_per_exc": 0.25,
    "network.n_exc": 800,
    "network.refractory_exc_ms": 5.0,
    "network.refractory_inh_ms": 2.0,
    "network.tau_exc_ms": 5.0,
    "network.tau_inh_ms": 10.0,
    "network.tau_m_ms": 20.0,
    "network.v_reset_mv": -60.0,
    "network.v_threshold_mv": -50.0,
    "network.w_e_to_e": 0.05,
    "network.w_e_to_i": 0.1,
    "network.w_i_to_e": 0.9,
    "network.w_i_to_i": 0.3,
    "plasticity.freeze_after_imprint": False,
    "plasticity.heterosynaptic.beta": 0.03,
    "plasticity.heterosynaptic.bistable_strength": 80.0,
    "plasticity.heterosynaptic.bistable_upper_weight": 0.25,
    "plasticity.heterosynaptic.enabled": True,
    "plasticity.heterosynaptic.tau_consolidation_s": 1200.0,
    "plasticity.heterosynaptic.w_ref_mode": "fixed",
    "plasticity.inhibitory.enabled": True,
    "plasticity.inhibitory.eta": 0.005,
    "plasticity.inhibitory.rho0_hz": 3.0,
    "plasticity.inhibitory.tau_ms": 20.0,
    "plasticity.inhibitory.w_max": 3.0,
    "plasticity.transmitter.delta": 0.0001,
    "plasticity.transmitter.enabled": True,
    "plasticity.triplet.a_ltp": 0.02,
    "plasticity.triplet.b_ltd": 0.004,
    "plasticity.triplet.enabled": True,
    "plasticity.triplet.tau_minus_ms": 33.7,
    "plasticity.triplet.tau_plus_ms": 16.8,
    "plasticity.triplet.tau_slow_ms": 100.0,
    "plasticity.triplet.w_max": 0.5,
    "protocol.cue_duration_s": 0.2,
    "protocol.cue_fraction": 0.5,
    "protocol.cue_gap_s": 0.5,
    "protocol.cue_rate_hz": 2000.0,
    "protocol.cue_skip_s": 0.02,
    "protocol.cue_weight": 0.1,
    "protocol.hold_s": 10.0,
    "protocol.imprint_off_s": 1.0,
    "protocol.imprint_on_s": 1.0,
    "protocol.imprint_rate_hz": 600.0,
    "protocol.imprint_repeats": 4,
    "protocol.imprint_weight": 0.1,
    "protocol.persistence_window_s": 0.1,
    "protocol.retention_delays_s": (),
    "protocol.settle_s": 1.0,
    "protocol.snapshots": 5,
}

ADDED_IN_3_0: tuple[str, ...] = ("detection.recall_alpha", "detection.recall_null_draws")
"""Keys of :data:`FIRST_DEFAULTS` the registry gained with store schema 3.0: the releases that wrote schemas 2.0
(commit 39a272a) and 2.1 (551b9ed) had every other key, at the default below (checked against their
``registry.defaults()``), and not these."""


def schema_2_defaults() -> dict[str, Any]:
    """The defaults table of the stores of schema 2.0 and 2.1: every key their point ids hash, with its default."""
    return {key: value for key, value in FIRST_DEFAULTS.items() if key not in ADDED_IN_3_0}
