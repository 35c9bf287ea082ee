"""Point ids and store fingerprints that survive new registry keys and catch changed defaults.

A store lives longer than a capsweep version: a key added to the registry at its default must leave
every id and the fingerprint as they were, ids of stores made before stores recorded their defaults
table must stay valid, and a default that changed under a store's points must stop resume and grow
with one line naming the key, the old and the new value. The registry is changed here the way a
later version would change it (a key added, a default changed); stores are laid out for real (Zarr).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import sys
from pathlib import Path

import numpy as np
import pytest
import zarr

from capsweep import registry
from capsweep.errors import StoreError
from capsweep.results_schema import attrs
from capsweep.sweeps.expand import Grid
from capsweep.sweeps.identity import fingerprint, open_or_create
from capsweep.sweeps.ids import identity_defaults, point_id
from capsweep.sweeps.sweepfile import load_sweep, parse_sweep

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
SWEEP = """
[sweep]
name = "odour-identity"
store = "{store}"
replicates = 2
base_seed = 5
[[sweep.axis]]
name = "n_odours"
key = "assemblies.count"
values = [1, 2]
[assemblies]
size = 40
[network]
n_exc = 200
{extra}
"""
EXTRA = "network.extra_tau_ms"  # a key a later version might add
CHANGED = "network.delay_ms"  # a key whose default a later version might change


ADDED_AFTER_3_0 = ("plasticity.heterosynaptic.w_ref_start", "protocol.imprint_order", "protocol.retention_design")
"""Registry keys that schema 3.0 configs did not have (added with schema 3.2, December 2026): a 3.0 config is
today's without them, and today's ids must not depend on them while they stay at their defaults."""


def full_config_id(flat: dict, replicate: int) -> str:
    """A point id as stores of schema 3.0 (before stores recorded a defaults table) made it: SHA-256 of the JSON
    (sorted keys) of the whole resolved config of that version (without [execution] and :data:`ADDED_AFTER_3_0`)
    and the replicate, first 16 hex digits [derived: that version's ``identity.point_id``, written out here, not
    imported]."""
    config = {k: v for k, v in flat.items() if not k.startswith("execution.") and k not in ADDED_AFTER_3_0}
    blob = json.dumps({"config": config, "replicate": replicate}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def with_keys(monkeypatch: pytest.MonkeyPatch, *keys: registry.Key) -> None:
    """The registry of a later version: ``keys`` replace those of the same path or are added."""
    table = {**registry.BY_PATH, **{k.path: k for k in keys}}
    for module in [m for name, m in sys.modules.items() if name.startswith("capsweep")]:
        if getattr(module, "BY_PATH", None) is registry.BY_PATH and module is not registry:
            monkeypatch.setattr(module, "BY_PATH", table)  # imported by name
    monkeypatch.setattr(registry, "KEYS", tuple(table.values()))
    monkeypatch.setattr(registry, "BY_PATH", table)


def extra_key(default: float = 10.0) -> registry.Key:
    return dataclasses.replace(registry.BY_PATH[CHANGED], path=EXTRA, default=default, description="a new key")


def changed_default(value: float) -> registry.Key:
    return dataclasses.replace(registry.BY_PATH[CHANGED], default=value)


def grid(tmp_path: Path, extra: str = "") -> Grid:
    return Grid(parse_sweep(SWEEP.format(store=tmp_path / "odour.zarr", extra=extra)))


def test_demo_ids_are_those_of_schema_3_0_stores() -> None:
    """Stores made before this change resume: every id of the demo is the schema 3.0 hash of its full config."""
    demo = Grid(load_sweep(CONFIGS / "demo.toml"))
    ids, _ = demo.ids_and_seeds()
    assert ids.size == 36
    for point in demo.points():
        assert ids[point.index] == point.point_id == full_config_id(demo.flat(point.index[:-1]), point.index[-1])


def test_a_new_key_at_its_default_changes_no_id_and_no_fingerprint(tmp_path, monkeypatch) -> None:
    before = grid(tmp_path)
    ids_before, seeds_before = before.ids_and_seeds()
    print_before = fingerprint(before.sweep)
    with_keys(monkeypatch, extra_key())
    after = grid(tmp_path)
    assert after.sweep.base[EXTRA] == 10.0, "the later registry's key is part of every config"
    ids_after, seeds_after = after.ids_and_seeds()
    assert (ids_after == ids_before).all() and (seeds_after == seeds_before).all()
    assert fingerprint(after.sweep) == print_before
    # control: the same key set away from its default is a different point
    moved = grid(tmp_path, extra="extra_tau_ms = 15.0")
    assert not np.isin(moved.ids_and_seeds()[0], ids_before).any()
    assert fingerprint(moved.sweep) != print_before
    assert point_id(moved.flat((0,)), 0) != point_id(after.flat((0,)), 0)


def test_a_store_records_the_defaults_table_and_resolved_config_its_ids_rest_on(tmp_path) -> None:
    store, laid_out = open_or_create(grid(tmp_path))
    store.close()
    stored = dict(zarr.open_group(tmp_path / "odour.zarr", mode="r").attrs)
    assert stored[attrs.IDENTITY_DEFAULTS][CHANGED] == registry.BY_PATH[CHANGED].default
    assert not any(k.startswith("execution.") for k in stored[attrs.IDENTITY_DEFAULTS])
    assert stored[attrs.BASE_CONFIG]["network.n_exc"] == 200 and stored[attrs.BASE_CONFIG]["assemblies.size"] == 40
    assert stored[attrs.AXIS_SETTINGS] == [{"name": "n_odours", "key": "assemblies.count", "values": [1, 2]}]
    rebuilt = {**stored[attrs.BASE_CONFIG], "assemblies.count": 2}
    ids = np.asarray(zarr.open_group(tmp_path / "odour.zarr", mode="r")["point_id"][...])
    assert ids[1, 1] == full_config_id(rebuilt, 1), "the recorded config rebuilds a stored id"


def test_a_store_without_a_defaults_table_still_opens(tmp_path, monkeypatch) -> None:
    store, _ = open_or_create(grid(tmp_path))
    store.close()
    group = zarr.open_group(tmp_path / "odour.zarr", mode="r+")
    for name in (attrs.IDENTITY_DEFAULTS, attrs.BASE_CONFIG, attrs.AXIS_SETTINGS, attrs.POINT_ID_SCHEME):
        del group.attrs[name]  # as schema 3.0 stores were written
    with_keys(monkeypatch, extra_key())  # and a later registry
    store, reopened = open_or_create(grid(tmp_path))
    store.close()
    assert (reopened.ids_and_seeds()[0] == np.asarray(group["point_id"][...])).all()


def test_a_changed_default_the_store_ran_with_is_refused_in_one_line(tmp_path, monkeypatch) -> None:
    old = registry.BY_PATH[CHANGED].default
    store, made = open_or_create(grid(tmp_path))
    store.close()
    stored_ids = made.ids_and_seeds()[0]
    with_keys(monkeypatch, changed_default(old + 0.5))
    with pytest.raises(StoreError) as refused:
        open_or_create(grid(tmp_path))
    message = str(refused.value)
    assert "\n" not in message
    assert CHANGED in message and f"from {old} to {old + 0.5}" in message
    assert f"set {CHANGED} = {old}" in message
    # the way out the message names: set the key to its old value, and the store resumes with its ids
    store, resumed = open_or_create(grid(tmp_path, extra=f"delay_ms = {old}"))
    store.close()
    assert (resumed.ids_and_seeds()[0] == stored_ids).all()


def test_a_changed_default_of_a_key_added_later_is_caught_too(tmp_path, monkeypatch) -> None:
    """A key that enters ids only away from its default: the store's recorded default, not today's, decides."""
    with_keys(monkeypatch, extra_key(10.0))
    store, made = open_or_create(grid(tmp_path))
    store.close()
    with_keys(monkeypatch, extra_key(12.0))
    assert identity_defaults()[EXTRA] == 12.0
    with pytest.raises(StoreError, match=rf"{EXTRA} changed from 10.0 to 12.0"):
        open_or_create(grid(tmp_path))
    store, resumed = open_or_create(grid(tmp_path, extra="extra_tau_ms = 10.0"))
    store.close()
    assert (resumed.ids_and_seeds()[0] == made.ids_and_seeds()[0]).all()
