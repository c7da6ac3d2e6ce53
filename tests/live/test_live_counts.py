"""Issue 14: live drift counts and the report computed from them (no HTTP).

Outside references, named beside each check: the batch drift report of the same records (its bins and
shares: ``service.core.drift``, whose own tests check it against scipy), ``scipy.stats.mannwhitneyu`` on the
expanded samples, ``np.median``, and the definition of a level-alpha test and of PSI bands (common practice,
see ``service.core.drift``). Data: the drift model of ``tests/generators.py`` (known truth).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats
from threadpoolctl import threadpool_limits

from service.core.assign import assign, compile_bundle, impute
from service.core.drift import DriftRules, drift_of_batch
from service.core.fit import fit_bundle
from service.live.counts import read_counts, tally
from service.live.recorder import LiveRecorder, layout_of
from service.live.report import binned_mann_whitney_greater, compute_live_drift, histogram_median
from tests.calibration_runs import config
from tests.generators import drift_model

RULES = DriftRules()


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    with threadpool_limits(1):
        yield


@pytest.fixture(scope="module")
def version():
    """A version fitted on 5,000 rows of the drift model (7 features: 6 Gaussian, 1 count 0-5 binned by value;
    5 % of f0 missing), served as the server serves it (a LoadedVersion-like object)."""
    rng = np.random.default_rng(14)
    bundle = fit_bundle(drift_model(5000, rng), config(7, 4, 3, seed=1))
    compiled = compile_bundle(bundle)
    return SimpleNamespace(name="shop", version=1, bundle=bundle, compiled=compiled)


def assigned(version, values):
    filled, _ = impute(version.compiled, values)
    return assign(version.compiled, filled)


def live_report(version, values_list):
    layout = layout_of(version)
    counts = sum(tally(layout, v, *(getattr(a, f) for f in ("segment", "far", "off_plane", "residual")))
                 for v, a in ((v, assigned(version, v)) for v in values_list))
    return compute_live_drift(version.bundle.reference, version.bundle.features, layout, read_counts(layout, counts),
                              rules=RULES, residual_available=version.compiled.has_residual)



def stored_counts(store, version) -> list[int]:
    """The stored live counts of version 1 of "shop", one per slot of its layout."""
    stored = np.zeros(layout_of(version).n_slots, dtype=np.int64)
    for slot, count in store.live_counts("shop", 1, since=0).items():
        stored[slot] = count
    return stored.tolist()


def reference_counts(version, values) -> list[int]:
    """The definition: all the records tallied at once."""
    return tally(layout_of(version), values, *(getattr(assigned(version, values), f)
                                               for f in ("segment", "far", "off_plane", "residual"))).tolist()

def test_counts_equal_a_batch_report_over_the_same_records_in_one_batch_or_one_by_one(version):
    # Reference: the batch report (service.core.drift.drift_of_batch) of the same 600 records: the same bins,
    # so the same PSI per feature, missing shares, segment counts and outlier count.
    values = drift_model(600, np.random.default_rng(5))
    values[:7, 6] = 9.0                                     # a count value never seen in training: "other"
    batch = drift_of_batch(version.bundle, version.compiled, values, RULES)
    whole = live_report(version, [values])
    one_by_one = live_report(version, [values[i:i + 1] for i in range(values.shape[0])])
    uneven = live_report(version, [values[:1], values[1:300], values[300:]])   # broadcast and searchsorted paths
    for live in (whole, one_by_one, uneven):
        assert live["n_records"] == batch["n_records"] == 600
        for got, want in zip(live["features"], batch["features"]):
            assert got["psi"] == pytest.approx(want["psi"], rel=1e-12, abs=1e-15)
            assert got["n_observed"] == want["n_observed"]
            assert got["missing_share"]["observed"] == want["missing_share"]["observed"]
            assert got["missing_share"]["p_value"] == want["missing_share"]["p_value"]
        assert live["segments"]["observed_count"] == batch["segments"]["observed_count"]
        assert live["segments"]["psi"] == batch["segments"]["psi"]
        assert live["outliers"]["observed_count"] == batch["outliers"]["observed_count"]
        assert live["outliers"]["p_value"] == batch["outliers"]["p_value"]
    assert whole["features"][0]["missing_share"]["observed"] > 0       # the missing slot is exercised
    assert whole == one_by_one == uneven


def test_binned_mann_whitney_matches_scipy_on_the_expanded_samples():
    # Reference: scipy.stats.mannwhitneyu(x, y, alternative='greater', method='asymptotic') on the samples the
    # counts describe (each bin's records share one value: ties).
    rng = np.random.default_rng(2)
    for _ in range(5):
        x_counts, y_counts = rng.integers(0, 40, 12), rng.integers(0, 60, 12)
        x, y = np.repeat(np.arange(12), x_counts), np.repeat(np.arange(12), y_counts)
        want = stats.mannwhitneyu(x, y, alternative="greater", method="asymptotic").pvalue
        assert binned_mann_whitney_greater(x_counts, y_counts) == pytest.approx(want, rel=1e-9)


def test_histogram_median_lies_in_the_bin_of_the_true_median():
    # Reference: np.median of the values; the interpolated median lies within the same bin.
    rng = np.random.default_rng(3)
    values = rng.gamma(2.0, 1.0, 5001)
    edges = np.quantile(values, np.arange(1, 20) / 20)
    counts = np.bincount(np.searchsorted(edges, values, side="left"), minlength=20)
    estimate, truth = histogram_median(counts, edges), float(np.median(values))
    b = int(np.searchsorted(edges, truth, side="left"))
    assert edges[b - 1] <= estimate <= edges[b]


@pytest.mark.slow
def test_calibration_no_alert_in_200_null_windows_and_a_half_sd_shift_is_found(version):
    # Definitions: on records of the training distribution a live window should not alert (status needs both a
    # level-0.01 test after BH and a material effect); a 0.5 SD shift of one feature should be found (status
    # watch or alert on that feature) in >= 95 % of windows of 2,000 (the target). One stream, cut in
    # windows, counted as the server counts it.
    rng = np.random.default_rng(140)
    statuses = [live_report(version, [drift_model(2000, rng)])["status"] for _ in range(200)]
    assert statuses.count("alert") == 0, statuses
    sd = float(version.bundle.reference.stds[1])
    found = 0
    for _ in range(100):
        values = drift_model(2000, rng)
        values[:, 1] += 0.5 * sd
        found += live_report(version, [values])["features"][1]["status"] != "stable"
    assert found >= 95, found


def test_recorder_counts_each_record_once_across_flushes_and_merges_by_addition(version, tmp_path):
    # Two recorders (two replicas) on one store: the stored buckets are the sum of what each saw, and a
    # record is counted once however often flush runs.
    from service.store import FilesystemStore

    store = FilesystemStore(tmp_path / "store")
    clock = [1_000_000.0]
    a, b = (LiveRecorder(store, bucket_seconds=300, flush_seconds=2, retention_days=30, clock=lambda: clock[0])
            for _ in range(2))
    values = drift_model(500, np.random.default_rng(9))
    for i in range(0, 500, 50):
        part = values[i:i + 50]
        (a if i % 100 else b).observe(version, part, assigned(version, part))
        a.flush()
        b.flush()
    a.flush()
    assert stored_counts(store, version) == reference_counts(version, values)


def test_retention_deletes_old_buckets_only(version, tmp_path):
    from service.store import FilesystemStore

    store = FilesystemStore(tmp_path / "store")
    day = 86_400
    now = [100 * day + 0.0]
    recorder = LiveRecorder(store, bucket_seconds=300, flush_seconds=2, retention_days=30, clock=lambda: now[0])
    values = drift_model(20, np.random.default_rng(1))
    for moment in (now[0] - 31 * day, now[0] - 29 * day):
        now[0] = moment
        recorder.observe(version, values, assigned(version, values))
    now[0] = 100 * day
    recorder.flush()
    assert store.live_counts("shop", 1, since=0)[0] == 40
    assert recorder.prune() > 0
    assert store.live_counts("shop", 1, since=0)[0] == 20      # the 31-day-old bucket went, the other stayed
    assert any(e["action"] == "prune_live_counts" for e in store.events(None, limit=10))


def test_queue_is_bounded_in_bytes_and_nothing_is_dropped(version, tmp_path):
    # The backlog bound: with the background thread never running (as when it falls behind under load), the
    # queued record values never pass max_queued_bytes plus one batch; past the bound observe tallies itself, so
    # every record is still counted exactly once (reference: tally of all the records at once, the definition).
    from service.store import FilesystemStore

    store = FilesystemStore(tmp_path / "store")
    values = drift_model(2_000, np.random.default_rng(21))
    batch_rows = 100
    batch_bytes = values[:batch_rows].nbytes
    recorder = LiveRecorder(store, bucket_seconds=300, flush_seconds=2, retention_days=30, clock=lambda: 1_000_000.0,
                            max_queued_bytes=5 * batch_bytes)
    seen = []
    for i in range(0, 2_000, batch_rows):
        part = values[i:i + batch_rows]
        recorder.observe(version, part, assigned(version, part))
        seen.append(recorder.queued_bytes())
    assert max(seen) <= 5 * batch_bytes + batch_bytes          # the bound (20 batches were observed)
    assert recorder.inline_tallies == 3                        # batches 6, 12 and 18 passed it: 20 // 6
    recorder.flush()
    assert recorder.queued_bytes() == 0
    assert stored_counts(store, version) == reference_counts(version, values)


def test_single_records_and_batches_mixed_in_one_tally_are_each_counted_once(version, tmp_path):
    # Reference: tally of all the records at once (the definition, reference_counts): records observed one by
    # one as Python numbers (observe_one, the single-record call) and batches (observe) queued together in the
    # same bucket give the counts of the whole set, whether the single records are alone in a tally or mixed.
    from service.core.assign import assign_one
    from service.store import FilesystemStore

    store = FilesystemStore(tmp_path / "store")
    recorder = LiveRecorder(store, bucket_seconds=300, flush_seconds=2, retention_days=30, clock=lambda: 1_000_000.0)
    values = drift_model(300, np.random.default_rng(33))
    filled, _ = impute(version.compiled, values)
    for i in range(0, 300, 30):
        if i % 60:
            recorder.observe(version, values[i:i + 30], assigned(version, values[i:i + 30]))
        else:
            for j in range(i, i + 30):
                one = assign_one(version.compiled, filled[j])
                row = values[j] if j % 2 else tuple(values[j].tolist())      # a 1-D array, or Python numbers
                recorder.observe_one(version, row, one.segment, one.far, one.off_plane, one.residual)
        if i == 120:
            recorder.tally()                  # a tally of batches and single records mixed
    recorder.flush()
    single = drift_model(5, np.random.default_rng(34))
    filled_single, _ = impute(version.compiled, single)
    for j in range(5):                        # a tally of single records only
        one = assign_one(version.compiled, tuple(filled_single[j].tolist()))
        recorder.observe_one(version, tuple(single[j].tolist()), one.segment, one.far, one.off_plane,
                             one.residual)
    recorder.flush()
    assert stored_counts(store, version) == reference_counts(version, np.vstack([values, single]))
