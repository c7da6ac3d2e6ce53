"""Drift statistics and their calibration, checked against outside references.

Each check names its reference in a comment: a SciPy function that computes the same statistic
independently, a hand computation whose arithmetic is written out, or a calibration against a
parametric model. The training distribution is a seeded Gaussian mixture drawn with scikit-learn's
``make_blobs`` (an outside generator): three spherical blobs in six dimensions with fixed centres,
equal weights and standard deviation 1.5, plus 5 % of feature f0 missing completely at random.
Fresh batches are new draws from that same model (multinomial blob counts, then ``make_blobs``).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats
from sklearn.datasets import make_blobs

from service.core.assign import compile_bundle
from service.core.bundle import FitConfig
from service.core.drift import (
    PSI_FLOOR,
    DriftRules,
    bin_counts,
    drift_of_batch,
    grade,
    outlier_drift,
    psi,
    residual_drift,
    segment_drift,
    worst,
)
from service.core.fit import fit_bundle

N_FEATURES = 6
FEATURES = [f"f{j}" for j in range(N_FEATURES)]
CENTERS = np.random.default_rng(3).uniform(-6.0, 6.0, size=(3, N_FEATURES))
BLOB_STD = 1.5
WEIGHTS = np.array([1 / 3, 1 / 3, 1 / 3])
MISSING_F0 = 0.05
RULES = DriftRules()  # the defaults: alpha 0.01, PSI bands 0.10 / 0.25


def draw(n: int, seed: int, weights: np.ndarray = WEIGHTS) -> np.ndarray:
    """n rows from the parametric model (see the module docstring)."""
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(n, weights)
    x, _ = make_blobs(n_samples=counts, centers=CENTERS, cluster_std=BLOB_STD, random_state=seed)
    x[rng.random(n) < MISSING_F0, 0] = np.nan
    return x


@pytest.fixture(scope="module")
def training() -> np.ndarray:
    return draw(20_000, seed=12345)


@pytest.fixture(scope="module")
def fitted(training):
    bundle = fit_bundle(training, FitConfig(features=FEATURES, components=3, k_min=3, k_max=3, k_fixed=True))
    return bundle, compile_bundle(bundle)


@pytest.fixture(scope="module")
def fitted_no_pca(training):
    bundle = fit_bundle(training, FitConfig(features=FEATURES, components=None, k_min=3, k_max=3, k_fixed=True))
    return bundle, compile_bundle(bundle)


def report_of(fitted, values):
    bundle, compiled = fitted
    return drift_of_batch(bundle, compiled, values, RULES)


def assert_json_finite(report):
    # API.md: numbers are plain JSON numbers, never NaN or Infinity; allow_nan=False raises on either.
    json.dumps(report, allow_nan=False)


# --------------------------------------------------------------------------- PSI by hand
def test_psi_matches_hand_computation():
    # Hand computation (PSI = sum (o - e) ln(o / e)), common practice, no single source:
    #   expected counts 25, 25, 50 -> shares 0.25, 0.25, 0.50
    #   observed counts 10, 30, 60 -> shares 0.10, 0.30, 0.60
    #   (0.10 - 0.25) ln(0.10 / 0.25) = -0.15 * -0.916291 = 0.137444
    #   (0.30 - 0.25) ln(0.30 / 0.25) =  0.05 *  0.182322 = 0.009116
    #   (0.60 - 0.50) ln(0.60 / 0.50) =  0.10 *  0.182322 = 0.018232
    #   total                                               0.164792
    assert psi(np.array([25, 25, 50]), np.array([10, 30, 60])) == pytest.approx(0.164792, abs=1e-6)


def test_psi_floors_empty_categories():
    # Hand computation with the documented floor of 1e-4 for an empty share:
    #   expected 0.5, 0.5; observed 1.0, 0.0 -> 0.0 floored to 1e-4 (not renormalised)
    #   (1.0 - 0.5) ln(1.0 / 0.5)       = 0.5 * 0.693147         = 0.346574
    #   (1e-4 - 0.5) ln(1e-4 / 0.5)     = -0.4999 * -8.517193    = 4.257745
    #   total                                                       4.604319
    assert PSI_FLOOR == 1e-4
    assert psi(np.array([1, 1]), np.array([7, 0])) == pytest.approx(4.604319, abs=1e-6)
    # Identical distributions: every term is 0.
    assert psi(np.array([3, 5, 2]), np.array([30, 50, 20])) == 0.0


def test_bin_counts_use_the_fit_bins():
    # Hand count, bins (-inf, 1], (1, 2], (2, inf) with edges [1, 2]:
    #   0 and 1 -> first; 1.5 and 2 -> second; 3 -> third.
    edges = np.array([1.0, 2.0])
    values = np.array([3.0, 1.0, 0.0, 2.0, 1.5])
    assert bin_counts(edges, values).tolist() == [2, 2, 1]
    # The rule the reference profile was built with (bundle.py): searchsorted(edges, x, side="left").
    rng = np.random.default_rng(0)
    x = rng.normal(size=1000).round(1)  # rounded: many values sit exactly on an edge
    e = np.unique(np.quantile(x, np.linspace(0.1, 0.9, 9)))
    expected = np.bincount(np.searchsorted(e, x, side="left"), minlength=e.size + 1)
    assert bin_counts(e, x).tolist() == expected.tolist()


@pytest.mark.parametrize(
    ("significant", "effect", "status"),
    [(False, 9.0, "stable"), (True, 0.05, "stable"), (True, 0.10, "watch"), (True, 0.2499, "watch"),
     (True, 0.25, "alert"), (True, None, "stable")],
    ids=["not-significant", "small-effect", "watch-edge", "below-alert", "alert-edge", "no-effect"])
def test_grade_needs_significance_and_material_effect(significant, effect, status):
    # The rule with the PSI bands 0.10 / 0.25 (common practice in credit scoring; Siddiqi 2006,
    # quoted from memory): bands are inclusive at their lower edge.
    assert grade(significant, effect, 0.10, 0.25) == status


def test_worst_orders_statuses():
    assert worst(["stable", "alert", "watch"]) == "alert"
    assert worst(["stable", "watch"]) == "watch"
    assert worst([]) == "stable"


# --------------------------------------------------------------------------- each statistic vs SciPy
def test_feature_statistics_match_scipy(fitted, training):
    bundle, _ = fitted
    batch = draw(1500, seed=77)
    batch[:, 2] += 0.6 * np.nanstd(training[:, 2])
    batch[np.random.default_rng(5).random(1500) < 0.2, 3] = np.nan  # 20 % missing where training had none
    report = report_of(fitted, batch)
    assert_json_finite(report)
    sample = bundle.reference.sample
    ks_p, miss_p = [], []
    for j, row in enumerate(report["features"]):
        col, ref = batch[:, j], sample[:, j]
        # Reference: scipy.stats.ks_2samp on the observed values of the batch and of the stored sample.
        ks = stats.ks_2samp(col[~np.isnan(col)], ref[~np.isnan(ref)])
        assert row["ks_statistic"] == pytest.approx(ks.statistic, rel=1e-12)
        assert row["p_value"] == pytest.approx(ks.pvalue, rel=1e-9, abs=1e-300)
        ks_p.append(ks.pvalue)
        # Reference: mean shift in population standard deviations of the training data (numpy, ddof=0).
        shift = (np.nanmean(col) - np.nanmean(training[:, j])) / np.nanstd(training[:, j])
        assert row["mean_shift_sd"] == pytest.approx(shift, rel=1e-9)
        # Reference: scipy.stats.fisher_exact on (missing, present) x (training, batch).
        train_missing = int(np.isnan(training[:, j]).sum())
        batch_missing = int(np.isnan(col).sum())
        table = [[train_missing, len(training) - train_missing], [batch_missing, len(col) - batch_missing]]
        fisher = stats.fisher_exact(table).pvalue if train_missing + batch_missing else 1.0
        assert row["missing_share"]["p_value"] == pytest.approx(fisher, rel=1e-9, abs=1e-300)
        assert row["missing_share"]["expected"] == pytest.approx(train_missing / len(training))
        assert row["missing_share"]["observed"] == pytest.approx(batch_missing / len(col))
        miss_p.append(fisher)
        # Reference: the PSI formula recomputed here on numpy's decile bins of the training column.
        train_col = training[:, j][~np.isnan(training[:, j])]
        edges = np.unique(np.quantile(train_col, np.linspace(0.1, 0.9, 9)))
        e = np.bincount(np.searchsorted(edges, train_col, side="left"), minlength=edges.size + 1) / train_col.size
        o = np.bincount(np.searchsorted(edges, col[~np.isnan(col)], side="left"), minlength=edges.size + 1)
        o = np.maximum(o / o.sum(), 1e-4)
        assert row["psi"] == pytest.approx(np.sum((o - e) * np.log(o / e)), rel=1e-9)
    # Reference: scipy.stats.false_discovery_control (Benjamini-Hochberg) over the features of the report.
    assert [r["q_value"] for r in report["features"]] == pytest.approx(stats.false_discovery_control(ks_p))
    assert [r["missing_share"]["q_value"] for r in report["features"]] == pytest.approx(
        stats.false_discovery_control(miss_p))
    # The shifted and the newly missing feature are the ones reported.
    assert report["features"][2]["reasons"] == ["distribution"]
    assert "missing_share" in report["features"][3]["reasons"]


def test_segment_statistics_match_scipy(fitted):
    bundle, compiled = fitted
    batch = draw(900, seed=78, weights=np.array([0.5, 0.3, 0.2]))
    report = report_of(fitted, batch)
    seg = report["segments"]
    counts = np.array(seg["observed_count"])
    expected = bundle.reference.segment_shares
    # Reference: the nearest-centroid rule computed with numpy on the imputed, scaled, projected batch.
    filled = np.where(np.isnan(batch), bundle.imputer.statistics_, batch)
    space = bundle.pca.transform(bundle.scaler.transform(filled))
    nearest = ((space[:, None, :] - bundle.centroids[None]) ** 2).sum(axis=2).argmin(axis=1)
    assert counts.tolist() == np.bincount(nearest, minlength=3).tolist()
    # Reference: scipy.stats.chisquare (Pearson goodness of fit) against the training shares.
    chi = stats.chisquare(counts, counts.sum() * expected)
    assert seg["chi2"] == pytest.approx(chi.statistic, rel=1e-12)
    assert seg["p_value"] == pytest.approx(chi.pvalue, rel=1e-9, abs=1e-300)
    o = counts / counts.sum()
    assert seg["psi"] == pytest.approx(np.sum((o - expected) * np.log(o / expected)), rel=1e-12)
    assert seg["expected_share"] == pytest.approx(expected.tolist())


def test_segment_chi_square_with_a_segment_training_never_reached():
    # Expected share 0 for segment 2: the documented floor (1e-4, renormalised) keeps chi-square finite.
    segments = np.array([0] * 60 + [1] * 35 + [2] * 5)
    result = segment_drift(np.array([0.6, 0.4, 0.0]), segments, RULES)
    floored = np.array([0.6, 0.4, 1e-4]) / 1.0001
    # Reference: scipy.stats.chisquare with those expected counts.
    chi = stats.chisquare([60, 35, 5], 100 * floored)
    assert result["chi2"] == pytest.approx(chi.statistic) and result["p_value"] == pytest.approx(chi.pvalue)
    assert result["status"] == "alert"
    assert_json_finite(result)


def test_outlier_rate_matches_binomtest():
    flagged = np.zeros(2000, dtype=bool)
    flagged[:61] = True
    result = outlier_drift(0.02, flagged, RULES)
    # Reference: scipy.stats.binomtest, exact, one-sided (the rate went up).
    expected = stats.binomtest(61, 2000, 0.02, alternative="greater").pvalue
    assert result["p_value"] == pytest.approx(expected, rel=1e-12)
    assert result["observed_rate"] == 61 / 2000 and result["rate_ratio"] == pytest.approx(61 / 2000 / 0.02)
    # 1.525x the training rate, significant -> watch (1.5 <= ratio < 2.0); 3x -> alert.
    assert expected < RULES.alpha and result["status"] == "watch"
    flagged[:120] = True
    assert outlier_drift(0.02, flagged, RULES)["status"] == "alert"


def test_residual_matches_mannwhitneyu(fitted):
    bundle, _ = fitted
    rng = np.random.default_rng(9)
    residuals = rng.choice(bundle.reference.residual_sample, size=800) * 1.6
    result = residual_drift(bundle.reference.residual_sample, bundle.reference.residual_median, residuals,
                            True, RULES)
    # Reference: scipy.stats.mannwhitneyu, one-sided (batch residuals stochastically larger).
    expected = stats.mannwhitneyu(residuals, bundle.reference.residual_sample, alternative="greater").pvalue
    assert result["p_value"] == pytest.approx(expected, rel=1e-9, abs=1e-300)
    assert result["observed_median"] == pytest.approx(np.median(residuals))
    assert result["median_ratio"] == pytest.approx(np.median(residuals) / bundle.reference.residual_median)
    assert result["status"] == "alert"  # ~1.6x the training median, p ~ 0


def test_no_pca_residual_is_reported_stable(fitted_no_pca):
    report = report_of(fitted_no_pca, draw(500, seed=80))
    assert report["residual"]["p_value"] == 1.0
    assert report["residual"]["status"] == "stable"
    assert report["residual"]["available"] is False
    assert_json_finite(report)


def test_single_segment_has_no_mix_to_test(training):
    bundle = fit_bundle(training[:2000], FitConfig(features=FEATURES, k_min=1, k_max=1, k_fixed=True, n_init=1))
    report = drift_of_batch(bundle, compile_bundle(bundle), draw(300, seed=81), RULES)
    assert report["segments"]["chi2"] == 0.0 and report["segments"]["p_value"] == 1.0
    assert report["segments"]["status"] == "stable"


# --------------------------------------------------------------------------- broken feeds
def test_feature_all_missing_alerts_through_the_missing_share(fitted):
    batch = draw(2000, seed=90)
    batch[:, 1] = np.nan
    report = report_of(fitted, batch)
    assert_json_finite(report)
    row = report["features"][1]
    # Nothing observed: KS 0 / p 1 and PSI 0 (nothing to compare), mean shift undefined -> null.
    assert (row["ks_statistic"], row["p_value"], row["psi"], row["mean_shift_sd"]) == (0.0, 1.0, 0.0, None)
    assert row["missing_share"]["observed"] == 1.0
    assert row["status"] == "alert" and row["reasons"] == ["missing_share"]
    assert report["status"] == "alert"
    others = [r["status"] for j, r in enumerate(report["features"]) if j != 1]
    assert others == ["stable"] * (N_FEATURES - 1)


def test_feature_mostly_missing_alerts(fitted):
    # f0 is 5 % missing in training; 60 % missing is a material change (two-category PSI ~ 1.2).
    batch = draw(2000, seed=91)
    batch[np.random.default_rng(1).random(2000) < 0.6, 0] = np.nan
    row = report_of(fitted, batch)["features"][0]
    assert row["status"] == "alert" and "missing_share" in row["reasons"]


def test_feature_gone_constant_alerts(fitted):
    batch = draw(2000, seed=92)
    batch[:, 4] = np.nanmedian(batch[:, 4])
    row = report_of(fitted, batch)["features"][4]
    assert row["status"] == "alert" and row["reasons"] == ["distribution"]


def test_huge_batch_does_not_alert_on_a_trivial_shift(fitted, training):
    # 100,000 rows, mean moved by 0.1 training SD: the KS test is overwhelmingly significant, but the
    # PSI (~0.01) is far below the watch band, so the materiality gate keeps the feature stable.
    batch = draw(100_000, seed=93)
    batch[:, 5] += 0.1 * np.nanstd(training[:, 5])
    row = report_of(fitted, batch)["features"][5]
    assert row["q_value"] < RULES.alpha
    assert row["psi"] < RULES.psi_watch
    assert row["status"] == "stable"


# --------------------------------------------------------------------------- calibration
def test_false_alarm_rate_on_batches_from_the_training_distribution(fitted):
    # Calibration against the parametric model (make_blobs): 200 batches of 2,000 rows drawn from the
    # training distribution; the issue allows at most 1 % of them to be reported "alert".
    alerts, ks_significant = 0, 0
    for seed in range(200):
        report = report_of(fitted, draw(2000, seed=10_000 + seed))
        alerts += report["status"] == "alert"
        ks_significant += sum(r["p_value"] < RULES.alpha for r in report["features"])
    assert alerts / 200 <= 0.01
    # The significance half of the rule is calibrated by itself too: under no drift, the share of KS
    # p-values below alpha is near alpha (at most twice it; the expected count is 12 of 1,200).
    assert ks_significant / (200 * N_FEATURES) <= 2 * RULES.alpha


@pytest.mark.parametrize("shifted", [2, 5])
def test_power_for_a_half_sd_mean_shift(fitted, training, shifted):
    # One feature's mean moved by 0.5 training SD, n = 2,000, 200 batches (the power check).
    sd = np.nanstd(training[:, shifted])
    caught, others_stable = 0, np.zeros(N_FEATURES)
    for seed in range(200):
        batch = draw(2000, seed=20_000 + seed)
        batch[:, shifted] += 0.5 * sd
        rows = report_of(fitted, batch)["features"]
        caught += rows[shifted]["status"] in ("watch", "alert")
        others_stable += [r["status"] == "stable" for r in rows]
    assert caught / 200 >= 0.95
    others = np.delete(others_stable, shifted) / 200
    assert others.min() >= 0.95, others


def test_doubled_segment_share_alerts(fitted):
    # Blob 0's share doubled (1/3 -> 2/3, the others 1/6 each); segment PSI ~ 0.46 by hand:
    # (2/3 - 1/3) ln 2 + 2 * (1/6 - 1/3) ln(1/2) = 0.231 + 0.231.
    statuses = [report_of(fitted, draw(2000, seed=30_000 + s, weights=np.array([2 / 3, 1 / 6, 1 / 6])))["segments"]
                for s in range(20)]
    assert all(s["status"] == "alert" for s in statuses)
    assert np.mean([s["psi"] for s in statuses]) == pytest.approx(0.46, abs=0.05)
