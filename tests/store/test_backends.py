"""One store suite, run unchanged on every backend (``local``: SQLite + files; ``postgres``: the real server).

What it checks is the store contract the routes rely on: version numbers, live pointers, labels, drift reports,
events, keys, deletion, and that two processes sharing one store (replicas) see each other's writes after a
refresh. Iris (scikit-learn's copy of Fisher's data) gives the small bundles.
"""

from __future__ import annotations

import threading

import anyio
import numpy as np
import pytest

from service.errors import (
    BundleCorrupt,
    Conflict,
    KeyNameTaken,
    KeyNotFound,
    NoLiveVersion,
    SegmentationNotFound,
    SegmentNotFound,
    StoreUnavailable,
    VersionNotFound,
)
from service.store import open_store


@pytest.fixture
def store(store_settings):
    opened = open_store(store_settings)
    yield opened
    opened.close()


@pytest.fixture
def replica(store_settings, store):
    """A second process's view of the same store (its own connections and its own serving cache)."""
    opened = open_store(store_settings)
    yield opened
    opened.close()


def test_versions_are_numbered_and_the_first_goes_live(store, bundles):
    first = store.save_version("shop", bundles[0], make_live=None, actor="alice")
    second = store.save_version("shop", bundles[1], make_live=None, actor="bob")
    assert (first["version"], first["live"], second["version"], second["live"]) == (1, True, 2, False)
    assert first["bundle_sha256"] != second["bundle_sha256"]
    detail = store.get_segmentation("shop")
    assert (detail["live_version"], detail["latest_version"]) == (1, 2)
    assert [(v["version"], v["live"], v["k"], v["created_by"]) for v in detail["versions"]] == [
        (1, True, 2, "alice"), (2, False, 3, "bob")]
    assert [row["name"] for row in store.list_segmentations()] == ["shop"]
    assert store.version_report("shop", 2)["k"] == 3


def test_version_summaries_name_the_fit_engine(store, bundles):
    import dataclasses

    store.save_version("shop", bundles[0], make_live=None)          # fitted by fit_bundle: the memory engine
    streamed = dataclasses.replace(bundles[1], report={**bundles[1].report, "engine": "out_of_core"})
    store.save_version("shop", streamed, make_live=None)
    assert [v["engine"] for v in store.get_segmentation("shop")["versions"]] == ["memory", "out_of_core"]


def test_a_loaded_version_assigns_as_the_fitted_bundle_does(store, bundles, iris):
    from service.core.assign import assign, impute
    from service.core.serving import serving_version

    store.save_version("shop", bundles[1], make_live=True)
    loaded = store.load("shop", 1)
    direct = serving_version(bundles[1]).compiled          # the same bundle, never written or read
    filled, _ = impute(direct, iris.data)
    assert np.array_equal(assign(loaded.compiled, filled).segment, assign(direct, filled).segment)
    np.testing.assert_array_equal(assign(loaded.compiled, filled).distance, assign(direct, filled).distance)


def test_unknown_names_and_versions_are_named_errors(store, bundles):
    with pytest.raises(SegmentationNotFound):
        store.get_segmentation("nope")
    store.save_version("shop", bundles[0], make_live=False)
    with pytest.raises(NoLiveVersion):
        store.resolve_version("shop", None)
    with pytest.raises(VersionNotFound):
        store.resolve_version("shop", 7)
    with pytest.raises(SegmentNotFound):
        store.set_label("shop", 1, 5, "x")


def test_live_pointer_promote_and_roll_back_are_recorded(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    store.save_version("shop", bundles[1], make_live=None)
    store.set_live("shop", 2, actor="ops")
    assert store.resolve_version("shop", None) == 2
    store.set_live("shop", 1, actor="ops")
    assert store.resolve_version("shop", None) == 1
    changes = [(e["action"], e["actor"], e["details"].get("change")) for e in store.events("shop", limit=10)]
    assert changes[:2] == [("set_live", "ops", "roll_back"), ("set_live", "ops", "promote")]


def test_labels_are_kept_per_version_and_cleared_with_none(store, bundles):
    store.save_version("shop", bundles[1], make_live=None)
    store.set_label("shop", 1, 2, "loyal")
    assert store.labels("shop", 1) == {2: "loyal"}
    assert store.version_report("shop", 1)["segments"][2]["label"] == "loyal"
    store.set_label("shop", 1, 2, None)
    assert store.labels("shop", 1) == {}


def test_drift_reports_newest_first_filtered_and_pruned(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    for i, created in enumerate(["2020-01-01T00:00:00Z", "2026-01-01T00:00:00Z", "2026-06-01T00:00:00Z"]):
        store.save_drift_report({"id": f"r{i}", "name": "shop", "version": 1, "created_at": created, "n": i})
    assert [r["id"] for r in store.list_drift_reports("shop", version=None, limit=2)] == ["r2", "r1"]
    assert store.list_drift_reports("shop", version=9, limit=10) == []
    assert store.prune_drift_reports("2025-01-01T00:00:00Z") == 1
    assert [r["id"] for r in store.list_drift_reports("shop", version=1, limit=10)] == ["r2", "r1"]


def test_keys_are_created_listed_and_revoked(store):
    before = store.keys_counter()
    key = store.create_key("ops", ["admin"], actor="cli")
    assert len(key) >= 40 and store.keys_counter() != before
    [stored] = store.stored_keys()
    assert (stored.name, stored.scopes, stored.prefix) == ("ops", ("admin",), key[:len(stored.prefix)])
    assert key.encode() not in stored.digest and isinstance(stored.salt, bytes)
    with pytest.raises(KeyNameTaken):
        store.create_key("ops", ["read"])
    store.revoke_key("ops")
    assert store.stored_keys() == []
    with pytest.raises(KeyNotFound):
        store.revoke_key("ops")
    assert [e["action"] for e in store.events(None, limit=5)] == ["revoke_key", "create_key"]


def test_deleting_a_version_refuses_the_live_one_and_erases_the_rest(store, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    store.save_version("shop", bundles[1], make_live=None)
    store.set_label("shop", 2, 0, "x")
    store.save_drift_report({"id": "d", "name": "shop", "version": 2, "created_at": "2026-01-01T00:00:00Z"})
    with pytest.raises(Conflict):
        store.delete_version("shop", 1)
    store.load("shop", 2)
    store.delete_version("shop", 2, actor="dpo")
    with pytest.raises(VersionNotFound):
        store.load("shop", 2)
    assert store.list_drift_reports("shop", version=None, limit=10) == []
    store.delete_segmentation("shop", actor="dpo")
    with pytest.raises(SegmentationNotFound):
        store.get_segmentation("shop")
    assert store.list_segmentations() == []
    # A new segmentation of the same name starts a history of its own, from the deletion on.
    store.save_version("shop", bundles[0], make_live=None)
    assert [e["action"] for e in store.events("shop", limit=10)] == ["fit", "delete_segmentation"]


def test_concurrent_fits_from_two_replicas_get_distinct_numbers(store, replica, bundles):
    numbers, errors = [], []

    def fit(target):
        try:
            for _ in range(3):
                numbers.append(target.save_version("race", bundles[0], make_live=None)["version"])
        except Exception as exc:  # collected: a failure must show, not vanish in a thread
            errors.append(exc)

    threads = [threading.Thread(target=fit, args=(s,)) for s in (store, replica, store, replica)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    assert sorted(numbers) == list(range(1, 13))
    assert store.get_segmentation("race")["latest_version"] == 12


def test_a_replica_sees_versions_live_pointers_labels_and_keys_after_a_refresh(store, replica, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    assert replica.resolve_version("shop", None) == 1          # unknown to its memory: read from the index
    assert replica.labels("shop", 1) == {}                     # now held in its memory
    store.save_version("shop", bundles[1], make_live=True)
    store.set_label("shop", 1, 0, "first")
    assert replica.refresh() is True
    assert replica.resolve_version("shop", None) == 2 and replica.labels("shop", 1) == {0: "first"}
    assert replica.refresh() is False                          # nothing new
    counter = replica.keys_counter()
    store.create_key("ops", ["read"])
    assert replica.keys_counter() != counter
    store.delete_version("shop", 1)
    replica.refresh()
    with pytest.raises(VersionNotFound):
        replica.resolve_version("shop", 1)


def test_a_tampered_artifact_is_refused_on_load(store, bundles, tmp_path):
    report = store.save_version("shop", bundles[0], make_live=None)
    sha = report["bundle_sha256"]
    [artifact] = [p for p in tmp_path.rglob("*.npz") if p.read_bytes() and _sha(p) == sha]
    data = bytearray(artifact.read_bytes())
    data[len(data) // 2] ^= 0x01
    artifact.write_bytes(bytes(data))
    with pytest.raises(BundleCorrupt):
        store.load("shop", 1)


def test_readiness_verifies_each_live_version_once(store_settings, bundles):
    small = open_store(store_settings.model_copy(update={"bundle_cache_size": 1}))
    try:
        for name in ("a", "b", "c"):
            small.save_version(name, bundles[0], make_live=None)
        assert small.readiness() == []
        loads = []
        original = small.backend.load
        small.backend.load = lambda *args: loads.append(args) or original(*args)
        assert small.readiness() == [] and small.readiness() == []
        assert loads == []          # no probe reloads (and evicts) what is served
    finally:
        small.close()


def _sha(path):
    import hashlib

    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_warm_holds_a_version_made_live_elsewhere_so_it_is_served_without_the_index(store, replica, bundles):
    store.save_version("shop", bundles[0], make_live=None)
    store.set_label("shop", 1, 0, "first")
    replica.refresh()
    assert replica.loaded_count() == 0
    assert replica.warm() == [] and replica.loaded_count() == 1

    def unavailable(*args, **kwargs):
        raise StoreUnavailable("the store database is unavailable (test)")
    for read in ("load", "labels", "resolve_version"):
        setattr(replica.backend, read, unavailable)
    # Served from memory alone: the bundle and its labels.
    loaded, labels = anyio.run(replica.serving, "shop", None)
    assert loaded.version == 1 and labels == {0: "first"}
    assert replica.warm() == []             # nothing left to load: no index read


def test_warm_reports_a_broken_live_version_once_until_the_index_changes(store, bundles, tmp_path):
    report = store.save_version("shop", bundles[0], make_live=None)
    [artifact] = [p for p in tmp_path.rglob("*.npz") if _sha(p) == report["bundle_sha256"]]
    artifact.write_bytes(b"not an archive")
    problems = store.warm()
    assert [(p["segmentation"], p["version"]) for p in problems] == [("shop", 1)]
    assert store.warm() == []               # not retried every second
    store.save_version("shop", bundles[1], make_live=True)
    assert store.warm() == [] and store.loaded_count() == 1
