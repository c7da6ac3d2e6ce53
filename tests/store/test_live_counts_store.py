"""Issue 14: the live-count rows of both store backends (the same tests run on local and postgres)."""

from __future__ import annotations

import pytest

from service.store import open_store


@pytest.fixture
def store(store_settings):
    opened = open_store(store_settings)
    yield opened
    opened.close()


def test_counts_add_up_across_writes_and_read_back_by_window(store):
    # Two writers (replicas) adding to the same bucket: the store keeps the sum (merge by addition).
    store.add_live_counts([("shop", 1, 600, 300, 0, 5), ("shop", 1, 600, 300, 7, 2)])
    store.add_live_counts([("shop", 1, 600, 300, 0, 3), ("shop", 1, 900, 300, 0, 4), ("shop", 2, 600, 300, 0, 9)])
    assert store.live_counts("shop", 1, since=0) == {0: 12, 7: 2}
    assert store.live_counts("shop", 1, since=900) == {0: 4}
    assert store.live_counts("shop", 2, since=0) == {0: 9}
    assert store.live_counts("other", 1, since=0) == {}


def test_retention_deletes_buckets_before_the_cutoff(store):
    store.add_live_counts([("shop", 1, 600, 300, 0, 5), ("shop", 1, 900, 300, 0, 4)])
    assert store.prune_live_counts(900) == 1
    assert store.live_counts("shop", 1, since=0) == {0: 4}
    assert store.prune_live_counts(900) == 0


def test_deleting_a_version_or_segmentation_deletes_its_counts(store, iris):
    # A version fitted on scikit-learn's Iris, stored twice (versions 1 and 2).
    from service.core.bundle import FitConfig
    from service.core.fit import fit_bundle

    features = list(iris.feature_names)
    bundle = fit_bundle(iris.data, FitConfig(features=features, k_min=2, k_max=2, k_fixed=True, n_init=1))
    store.save_version("shop", bundle, make_live=True)
    store.save_version("shop", bundle, make_live=False)
    store.add_live_counts([("shop", 1, 600, 300, 0, 5), ("shop", 2, 600, 300, 0, 4)])
    store.delete_version("shop", 2)
    assert store.live_counts("shop", 2, since=0) == {}
    assert store.live_counts("shop", 1, since=0) == {0: 5}
    store.delete_segmentation("shop")
    assert store.live_counts("shop", 1, since=0) == {}
