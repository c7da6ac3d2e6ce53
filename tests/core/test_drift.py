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
    DriftRules,
    bin_counts,
    category_counts,
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


# No test here reads the fit's silhouette: 500 sampled rows of it instead of the default 10,000 (on 20,000
# training rows that default costs the fit ~2 s of CPU, most of its time).
SILHOUETTE_SAMPLE = 500


@pytest.fixture(scope="module")
def fitted(training):
    bundle = fit_bundle(training, FitConfig(features=FEATURES, components=3, k_min=3, k_max=3, k_fixed=True,
                                            silhouette_sample=SILHOUETTE_SAMPLE))
    return bundle, compile_bundle(bundle)


@pytest.fixture(scope="module")
def fitted_no_pca(training):
    bundle = fit_bundle(training, FitConfig(features=FEATURES, components=None, k_min=3, k_max=3, k_fixed=True,
                                            silhouette_sample=SILHOUETTE_SAMPLE))
    return bundle, compile_bundle(bundle)


def report_of(fitted, values):
    bundle, compiled = fitted
    return drift_of_batch(bundle, compiled, values, RULES)


def assert_json_finite(report):
    # API.md: numbers are plain JSON numbers, never NaN or Infinity; allow_nan=False raises on either.
    json.dumps(report, allow_nan=False)


# --------------------------------------------------------------------------- PSI by hand
def test_psi_matches_hand_computation():
    # Hand computation (PSI = sum (o - e) ln(o / e)), common practice, no single source, on Jeffreys-smoothed
    # shares (c + 0.5) / (n + 1.5) with n = 100, B = 3:
    #   expected counts 25, 25, 50 -> 25.5 / 101.5, 25.5 / 101.5, 50.5 / 101.5 = 0.251232, 0.251232, 0.497537
    #   observed counts 10, 30, 60 -> 10.5 / 101.5, 30.5 / 101.5, 60.5 / 101.5 = 0.103448, 0.300493, 0.596059
    #   (0.103448 - 0.251232) ln(0.103448 / 0.251232) = -0.147783 * -0.887303 = 0.131129
    #   (0.300493 - 0.251232) ln(0.300493 / 0.251232) =  0.049261 *  0.179048 = 0.008820
    #   (0.596059 - 0.497537) ln(0.596059 / 0.497537) =  0.098522 *  0.180670 = 0.017800
    #   total                                                                    0.157749
    assert psi(np.array([25, 25, 50]), np.array([10, 30, 60])) == pytest.approx(0.157749, abs=2e-6)


def test_psi_smooths_shares_with_jeffreys():
    # Hand computation with Jeffreys-smoothed shares (c + 0.5) / (n + B / 2) (Jeffreys 1946, Dirichlet(1/2)):
    #   expected counts 1, 1 (n 2, B 2): shares 1.5 / 3 = 0.5, 0.5
    #   observed counts 7, 0 (n 7, B 2): shares 7.5 / 8 = 0.9375, 0.5 / 8 = 0.0625
    #   (0.9375 - 0.5) ln(0.9375 / 0.5) = 0.4375 * 0.628609 = 0.275016
    #   (0.0625 - 0.5) ln(0.0625 / 0.5) = -0.4375 * -2.079442 = 0.909756
    #   total                                                   1.184772
    assert psi(np.array([1, 1]), np.array([7, 0])) == pytest.approx(1.184772, abs=1e-6)
    # Identical shares with equal totals: every term is 0.
    assert psi(np.array([3, 5, 2]), np.array([3, 5, 2])) == 0.0


def test_category_counts_by_value_plus_other():
    # Hand count: categories 0, 1, 5; values 0 0 1 3 5 5 7 -> 0: 2, 1: 1, 5: 2, other (3 and 7): 2.
    values = np.sort(np.array([5.0, 0.0, 7.0, 1.0, 0.0, 3.0, 5.0]))
    assert category_counts(np.array([0.0, 1.0, 5.0]), values).tolist() == [2, 1, 2, 2]


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
        # Reference: the PSI formula recomputed here on numpy's decile bins of the training column, with
        # Jeffreys-smoothed shares (c + 0.5) / (n + B / 2) on both sides (Jeffreys 1946).
        train_col = training[:, j][~np.isnan(training[:, j])]
        edges = np.unique(np.quantile(train_col, np.linspace(0.1, 0.9, 9)))
        bins = edges.size + 1
        e = np.bincount(np.searchsorted(edges, train_col, side="left"), minlength=bins)
        o = np.bincount(np.searchsorted(edges, col[~np.isnan(col)], side="left"), minlength=bins)
        e, o = (e + 0.5) / (e.sum() + bins / 2), (o + 0.5) / (o.sum() + bins / 2)
        assert row["bins"] == "quantiles"
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
    report = drift_of_batch(bundle, compiled, batch, RULES, labels={1: "steady"})
    seg = report["segments"]
    counts = np.array(seg["observed_count"])
    train = bundle.reference.segment_counts
    # Reference: the nearest-centroid rule computed with numpy on the imputed, scaled, projected batch.
    filled = np.where(np.isnan(batch), bundle.imputer.statistics_, batch)
    space = bundle.pca.transform(bundle.scaler.transform(filled))
    nearest = ((space[:, None, :] - bundle.centroids[None]) ** 2).sum(axis=2).argmin(axis=1)
    assert counts.tolist() == np.bincount(nearest, minlength=3).tolist()
    # Reference: scipy.stats.chi2_contingency (test of homogeneity, training counts vs batch counts).
    chi = stats.chi2_contingency(np.vstack([train, counts]), correction=False)
    assert seg["test"] == "chi-square"
    assert seg["chi2"] == pytest.approx(chi.statistic, rel=1e-12)
    assert seg["p_value"] == pytest.approx(chi.pvalue, rel=1e-9, abs=1e-300)
    # PSI on Jeffreys-smoothed shares (Jeffreys 1946).
    e, o = (train + 0.5) / (train.sum() + 1.5), (counts + 0.5) / (counts.sum() + 1.5)
    assert seg["psi"] == pytest.approx(np.sum((o - e) * np.log(o / e)), rel=1e-12)
    assert seg["expected_share"] == pytest.approx((train / train.sum()).tolist())
    # Per segment: 2 x 2 chi2_contingency, q-values by scipy.stats.false_discovery_control, Cohen's h (Cohen 1988).
    p_values = []
    for item, c in zip(seg["by_segment"], range(3)):
        table = [[train[c], train.sum() - train[c]], [counts[c], counts.sum() - counts[c]]]
        p_values.append(stats.chi2_contingency(table, correction=False).pvalue)
        assert item["p_value"] == pytest.approx(p_values[-1], rel=1e-9, abs=1e-300)
        h = 2 * np.arcsin(np.sqrt(counts[c] / counts.sum())) - 2 * np.arcsin(np.sqrt(train[c] / train.sum()))
        assert item["cohens_h"] == pytest.approx(h, rel=1e-12)
        assert item["id"] == c and item["label"] == ("steady" if c == 1 else None)
    assert [i["q_value"] for i in seg["by_segment"]] == pytest.approx(stats.false_discovery_control(p_values))
    assert_json_finite(report)


def test_segment_mix_with_small_counts_uses_a_monte_carlo_exact_test():
    # 12 batch rows over 3 segments: expected counts under 5, so the mix uses the exact conditional test.
    # Reference: the exact p-value of the 2 x 3 table computed by enumerating every batch row with the same
    # margins (multivariate hypergeometric probabilities from math.comb), summing those at least as extreme.
    from itertools import product
    from math import comb
    train, batch = np.array([50, 30, 20]), np.array([2, 2, 8])
    result = segment_drift(train, np.repeat(np.arange(3), batch), RULES)
    assert result["test"] == "monte-carlo exact"
    columns, n = train + batch, batch.sum()
    expected = np.outer([train.sum(), n], columns) / columns.sum()

    def statistic(b):
        table = np.vstack([columns - b, b])
        return np.sum((table - expected) ** 2 / expected)

    observed = statistic(batch)
    exact = 0.0
    for b in product(*(range(min(c, n) + 1) for c in columns)):
        if sum(b) == n:
            if statistic(np.array(b)) >= observed * (1 - 1e-12):
                exact += np.prod([comb(int(c), int(x)) for c, x in zip(columns, b)]) / comb(int(columns.sum()), int(n))
    # 9,999 draws: standard error sqrt(p (1 - p) / 10,000) < 0.005.
    assert result["p_value"] == pytest.approx(exact, abs=0.01)
    assert result["chi2"] == pytest.approx(observed)


def test_segment_training_never_reached_is_tested_two_sample():
    # Training count 0 for segment 2; with a two-sample test nothing divides by zero and 5 batch rows there
    # are significant. Reference: scipy.stats.fisher_exact on that segment's 2 x 2 table (expected count < 5).
    segments = np.array([0] * 60 + [1] * 35 + [2] * 5)
    result = segment_drift(np.array([600, 400, 0]), segments, RULES)
    item = result["by_segment"][2]
    assert item["p_value"] == pytest.approx(stats.fisher_exact([[0, 1000], [5, 95]]).pvalue)
    assert item["cohens_h"] == pytest.approx(2 * np.arcsin(np.sqrt(0.05)))   # 0.451: alert
    assert item["status"] == "alert" and result["status"] == "alert"
    assert_json_finite(result)


def test_outlier_rate_matches_fisher_exact():
    flagged = np.zeros(2000, dtype=bool)
    flagged[:61] = True
    result = outlier_drift(200, 10_000, flagged, RULES)
    # Reference: scipy.stats.fisher_exact, one-sided (the batch rate is higher), batch vs held-out counts.
    expected = stats.fisher_exact([[61, 1939], [200, 9800]], alternative="greater").pvalue
    assert result["p_value"] == pytest.approx(expected, rel=1e-12)
    assert result["observed_rate"] == 61 / 2000
    # Rate ratio to the Jeffreys-smoothed baseline (200.5 / 10,001); the graded ratio is the lower 2.5 % Jeffreys
    # limit of the batch rate over the upper 97.5 % limit of the baseline (scipy.stats.beta.ppf).
    assert result["rate_ratio"] == pytest.approx(61 / 2000 / (200.5 / 10_001))
    upper = stats.beta.ppf(0.975, 200.5, 9800.5)                          # 0.0229
    assert result["ratio_lower_bound"] == pytest.approx(stats.beta.ppf(0.025, 61.5, 1939.5) / upper)
    # 61 flags: lower limit 0.0236, ratio 1.03 -> stable although significant; 100 flags: 0.0411 / 0.0229 = 1.80
    # -> watch; 150 flags: 0.0641 / 0.0229 = 2.80 -> alert.
    assert expected < RULES.alpha and result["status"] == "stable"
    flagged[:100] = True
    assert outlier_drift(200, 10_000, flagged, RULES)["status"] == "watch"
    flagged[:150] = True
    assert outlier_drift(200, 10_000, flagged, RULES)["status"] == "alert"


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
