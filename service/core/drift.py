"""Drift: how far a batch of records has moved from a version's training distribution.

Every item of a report pairs a two-sample significance test (training sample vs batch: the training side is
an estimate too, so no test takes a training figure as the truth) with an effect size, and its status needs
both:

=============  ==================================================  =========================================
item           significance (below ``alpha``)                       materiality (watch / alert)
=============  ==================================================  =========================================
feature        two-sample KS vs the stored training sample,         PSI on bins that fit the feature, 0.10 /
               BH q-value over the features                         0.25
feature        missing share: Fisher exact test, BH q-value         PSI over missing / present
segment mix    chi-square test of homogeneity, 2 x k table of       PSI over the segments
               training vs batch counts (Monte Carlo exact test
               conditional on the margins when a cell's expected
               count is under 5)
each segment   2 x 2 Pearson chi-square (Fisher exact when an       |Cohen's h| of the two shares, 0.1 / 0.2
               expected count is under 5), BH over segments
outlier rate   Fisher exact, one-sided (rate went up), vs the       lower 2.5 % Jeffreys limit of the batch rate
               held-out flag counts of the training rows            / upper 97.5 % limit of the held-out rate,
                                                                    1.5 / 2
residual       Mann-Whitney U, one-sided, vs held-out training      observed / held-out median, 1.2 / 1.5
               residuals
=============  ==================================================  =========================================

``stable`` unless significant; then ``alert`` at or above the alert effect size, ``watch`` at or above
the watch one. A feature's status is the worse of its two rows; the segment block's the worst of the mix and
the segments. The report's status is the worst item. The significance gate keeps small, noisy batches quiet;
the effect-size gate keeps huge batches from alarming on shifts too small to matter.

Shares in a PSI are Jeffreys-smoothed on both sides, ``(count + 0.5) / (n + bins / 2)`` (the posterior mean
under a Dirichlet(1/2) prior; Jeffreys 1946), so an empty bin has a finite share that depends on the sample
size rather than a fixed floor.

Everything returned is plain Python (floats, ints, str, lists, dicts) and finite: undefined values are
``None`` (``mean_shift_sd`` when the training std is 0 or the batch has no observed value; ratios when
the training figure is 0). Imports: numpy, scipy and the core's own modules (no web, schema or store).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass
from typing import Any, Sequence

import numpy as np
from scipy import stats

from service.core.assign import Assignment, CompiledBundle, assign, impute
from service.core.bundle import Bundle, ReferenceProfile

# Draws of the Monte Carlo exact test of the segment mix (small expected counts); a fixed seed keeps a
# report reproducible. With 9,999 draws a p-value near 0.01 has a standard error of ~0.001.
EXACT_DRAWS = 9_999
# Below this expected count in some cell, the chi-square approximation is not trusted (common practice,
# Cochran's rule; no single source).
MIN_EXPECTED = 5.0

STATUSES = ("stable", "watch", "alert")
_RANK = {status: i for i, status in enumerate(STATUSES)}


@dataclass(frozen=True)
class DriftRules:
    """Thresholds of the status rule (see the module docstring).

    PSI bands 0.10 / 0.25 are common practice in credit scoring (Siddiqi, *Credit Risk Scorecards*,
    2006; quoted from memory). Cohen's h bands: 0.2 is Cohen's "small" effect (Cohen 1988, quoted from
    memory) and is the alert level, so a segment going from 10 % to 20 % (h = 0.28) alerts; 0.1 for watch is
    our choice (a 10 % segment at ~13 %). The ratio thresholds have no standard source; they are settings.
    """

    alpha: float = 0.01
    psi_watch: float = 0.10
    psi_alert: float = 0.25
    outlier_ratio_watch: float = 1.5
    outlier_ratio_alert: float = 2.0
    residual_ratio_watch: float = 1.2
    residual_ratio_alert: float = 1.5
    segment_h_watch: float = 0.1
    segment_h_alert: float = 0.2

    def as_dict(self) -> dict[str, Any]:
        return {**asdict(self), "smoothing": "jeffreys"}


# --------------------------------------------------------------------------- small pieces
def smoothed_shares(counts: np.ndarray) -> np.ndarray:
    """Jeffreys-smoothed shares ``(c + 0.5) / (n + B / 2)`` of counts in B bins (Jeffreys 1946)."""
    c = np.asarray(counts, dtype=np.float64)
    return (c + 0.5) / (c.sum() + c.size / 2.0)


def psi(expected_counts: np.ndarray, observed_counts: np.ndarray) -> float:
    """Population stability index of ``observed`` against ``expected``, on Jeffreys-smoothed shares.

    Parameters
    ----------
    expected_counts, observed_counts : array of shape (n_bins,)
        Counts per bin (training, batch).

    Returns
    -------
    float
        ``sum_i (o_i - e_i) * ln(o_i / e_i)`` with ``o, e`` the smoothed shares; 0 when either side is empty.
    """
    e_counts = np.asarray(expected_counts, dtype=np.float64)
    o_counts = np.asarray(observed_counts, dtype=np.float64)
    if e_counts.sum() <= 0 or o_counts.sum() <= 0:
        return 0.0
    e, o = smoothed_shares(e_counts), smoothed_shares(o_counts)
    return float(np.sum((o - e) * np.log(o / e)))


def bin_counts(edges: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Counts of ``values`` in the bins (e[i-1], e[i]] set by inner ``edges``; len(edges) + 1 bins.

    The same bins as ``np.searchsorted(edges, x, side="left")`` gives at fit time.
    """
    return _counts_of_sorted(edges, np.sort(values))


def _counts_of_sorted(edges: np.ndarray, sorted_values: np.ndarray) -> np.ndarray:
    # Number of values <= e_i for each edge, then differences: O(bins * log n) on sorted data, where
    # binning each value is O(n log bins) with random access (several times slower at 10^5 rows).
    at_or_below = np.searchsorted(sorted_values, edges, side="right")
    return np.diff(np.concatenate(([0], at_or_below, [sorted_values.size])))


def category_counts(categories: np.ndarray, sorted_values: np.ndarray) -> np.ndarray:
    """Counts of each training category among ``sorted_values``, then of every other value (last bin)."""
    left = np.searchsorted(sorted_values, categories, side="left")
    right = np.searchsorted(sorted_values, categories, side="right")
    counts = right - left
    return np.append(counts, sorted_values.size - counts.sum())


def batch_bin_counts(kind: str, edges: np.ndarray, sorted_values: np.ndarray) -> np.ndarray:
    """The batch's counts on a feature's training bins (``ReferenceProfile.bin_kinds``)."""
    if kind == "categories":
        return category_counts(edges, sorted_values)
    return _counts_of_sorted(edges, sorted_values)


def grade(significant: bool, effect: float | None, watch: float, alert: float) -> str:
    """The status rule: ``stable`` unless significant; then by the effect size's band."""
    if not significant or effect is None:
        return "stable"
    if effect >= alert:
        return "alert"
    if effect >= watch:
        return "watch"
    return "stable"


def worst(statuses: Sequence[str]) -> str:
    return max(statuses, key=_RANK.__getitem__, default="stable")


def _p(value: float) -> float:
    """A p-value as a plain float; an undefined test (NaN) counts as no evidence (1.0)."""
    value = float(value)
    return value if math.isfinite(value) else 1.0


def _finite_or_none(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def ks_test(batch: np.ndarray, reference: np.ndarray) -> tuple[float, float]:
    """Two-sample KS statistic and p-value (``scipy.stats.ks_2samp``, two-sided, method 'auto').

    An empty side gives (0, 1): there is no distribution to compare, and the missing-share test
    carries the alarm for a feature that went missing.
    """
    if batch.size == 0 or reference.size == 0:
        return 0.0, 1.0
    with warnings.catch_warnings():
        # 'auto' tries the exact distribution for small samples and falls back to the asymptotic one
        # with a RuntimeWarning; the fallback is the documented behaviour, not a problem.
        warnings.simplefilter("ignore", RuntimeWarning)
        result = stats.ks_2samp(batch, reference)
    return float(result.statistic), _p(result.pvalue)


def missing_test(train_missing: int, train_total: int, batch_missing: int, batch_total: int) -> float:
    """Two-sided Fisher exact test on the 2x2 table (missing, present) x (training, batch).

    Fisher rather than a binomial test against the training share: the training share is itself an
    estimate, and with a training share of exactly 0 a binomial test would call one missing value in
    the batch infinitely significant. Fisher's table stays exact for the small counts usual here.
    """
    if train_missing + batch_missing == 0 or (train_missing == train_total and batch_missing == batch_total):
        return 1.0
    table = [[train_missing, train_total - train_missing], [batch_missing, batch_total - batch_missing]]
    return _p(stats.fisher_exact(table).pvalue)


def bh_qvalues(p_values: Sequence[float]) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (``scipy.stats.false_discovery_control``, method 'bh')."""
    p = np.asarray(p_values, dtype=np.float64)
    if p.size == 0:
        return p
    return np.minimum(stats.false_discovery_control(p, method="bh"), 1.0)


# --------------------------------------------------------------------------- items
def feature_drift(reference: ReferenceProfile, features: Sequence[str], values: np.ndarray,
                  rules: DriftRules) -> list[dict[str, Any]]:
    """Per-feature rows of the report.

    Parameters
    ----------
    reference : ReferenceProfile
        The version's training profile.
    features : sequence of str, length n_features
    values : ndarray of shape (n_records, n_features)
        Raw batch values, NaN = missing.
    rules : DriftRules

    Notes
    -----
    ``psi``, the KS statistic and ``mean_shift_sd`` describe the observed (non-missing) values only;
    the share of missing values is tested and measured separately, so that a feed that starts sending
    nulls alerts through ``missing_share`` even when the values that do arrive look normal. The PSI bins
    fit the feature (``ReferenceProfile.bin_kinds``): a feature with few distinct training values is binned
    by value (plus "other"), so a count's top value keeps its own bin.
    """
    n = values.shape[0]
    missing = np.isnan(values)
    n_missing = missing.sum(axis=0)
    train_n = reference.n_records
    rows = []
    ks_p, miss_p = [], []
    for j, name in enumerate(features):
        column = values[:, j]
        observed = np.sort(column[~missing[:, j]] if n_missing[j] else column)
        ref_sample = reference.sample[:, j]
        ref_sample = ref_sample[~np.isnan(ref_sample)]
        statistic, p_value = ks_test(observed, ref_sample)        # scipy.stats.ks_2samp, two-sample
        value_psi = (psi(reference.bin_counts[j], batch_bin_counts(reference.bin_kinds[j], reference.bin_edges[j],
                                                                   observed))
                     if observed.size else 0.0)
        std = float(reference.stds[j])
        shift = (float(observed.mean()) - float(reference.means[j])) / std if observed.size and std > 0 else None
        train_missing = int(reference.missing_count[j])
        expected_missing = train_missing / train_n
        observed_missing = float(n_missing[j]) / n
        missing_p = missing_test(train_missing, train_n, int(n_missing[j]), n)
        missing_psi = psi([train_missing, train_n - train_missing], [int(n_missing[j]), n - int(n_missing[j])])
        ks_p.append(p_value)
        miss_p.append(missing_p)
        rows.append({
            "name": name,
            "psi": value_psi,
            "bins": reference.bin_kinds[j],
            "ks_statistic": statistic,
            "p_value": p_value,
            "q_value": None,
            "mean_shift_sd": _finite_or_none(shift) if shift is not None else None,
            "n_observed": int(observed.size),
            "missing_share": {"expected": expected_missing, "observed": observed_missing, "psi": missing_psi,
                              "p_value": missing_p, "q_value": None},
        })
    return grade_feature_rows(rows, ks_p, miss_p, rules)


def grade_feature_rows(rows: list[dict[str, Any]], value_p: list[float], missing_p: list[float],
                       rules: DriftRules) -> list[dict[str, Any]]:
    """Each feature row's q-values, status and reasons, from its value and missing-share p-values (batch and
    live reports grade alike). Two families, each adjusted over the features of this report (Benjamini-
    Hochberg): value distributions and missing shares."""
    for row, q, mq in zip(rows, bh_qvalues(value_p).tolist(), bh_qvalues(missing_p).tolist()):
        row["q_value"] = q
        row["missing_share"]["q_value"] = mq
        by_values = grade(q < rules.alpha, row["psi"], rules.psi_watch, rules.psi_alert)
        by_missing = grade(mq < rules.alpha, row["missing_share"]["psi"], rules.psi_watch, rules.psi_alert)
        row["status"] = worst([by_values, by_missing])
        row["reasons"] = [reason for reason, status in (("distribution", by_values), ("missing_share", by_missing))
                          if status != "stable"]
    return rows


def _pearson_2xk(table: np.ndarray) -> tuple[float, float, str]:
    """Homogeneity of the rows of a 2 x k count table: (statistic, p-value, method).

    Pearson chi-square (``scipy.stats.chi2_contingency``, no continuity correction) when every expected
    count is at least ``MIN_EXPECTED``; otherwise a Monte Carlo exact test conditional on both margins (the
    batch row is multivariate hypergeometric under homogeneity), p = (1 + #{simulated >= observed}) / (draws + 1).
    Columns empty on both sides are dropped; fewer than two columns left: nothing to test (0, 1).
    """
    table = table[:, table.sum(axis=0) > 0]
    if table.shape[1] < 2 or np.any(table.sum(axis=1) == 0):
        return 0.0, 1.0, "none"
    columns, rows = table.sum(axis=0), table.sum(axis=1)
    expected = np.outer(rows, columns) / table.sum()
    statistic = float(np.sum((table - expected) ** 2 / expected))
    if expected.min() >= MIN_EXPECTED:
        result = stats.chi2_contingency(table, correction=False)
        return float(result.statistic), _p(result.pvalue), "chi-square"
    rng = np.random.default_rng(0)
    batch = rng.multivariate_hypergeometric(columns.astype(np.int64), int(rows[1]), size=EXACT_DRAWS)
    simulated_tables = np.stack([columns - batch, batch], axis=1)            # (draws, 2, k)
    simulated = np.sum((simulated_tables - expected) ** 2 / expected, axis=(1, 2))
    exceed = int(np.count_nonzero(simulated >= statistic * (1 - 1e-12)))
    return statistic, (1 + exceed) / (EXACT_DRAWS + 1), "monte-carlo exact"


def share_test(train_count: int, train_total: int, batch_count: int, batch_total: int) -> float:
    """Two-sided test that a category's share is the same in training and batch (two independent samples).

    The 2 x 2 Pearson chi-square (the pooled two-proportion z-test squared; ``scipy.stats.chi2_contingency``,
    no continuity correction) when every expected count is at least ``MIN_EXPECTED``, else Fisher's exact
    test (``scipy.stats.fisher_exact``).
    """
    table = np.array([[train_count, train_total - train_count], [batch_count, batch_total - batch_count]])
    if table.sum(axis=0).min() == 0:
        return 1.0
    expected = np.outer(table.sum(axis=1), table.sum(axis=0)) / table.sum()
    if expected.min() >= MIN_EXPECTED:
        return _p(stats.chi2_contingency(table, correction=False).pvalue)
    return _p(stats.fisher_exact(table).pvalue)


def cohens_h(p_batch: float, p_train: float) -> float:
    """Cohen's h = 2 asin(sqrt(p1)) - 2 asin(sqrt(p2)) (Cohen, 1988)."""
    return 2.0 * math.asin(math.sqrt(p_batch)) - 2.0 * math.asin(math.sqrt(p_train))


def segment_drift(train_counts: np.ndarray, segments: np.ndarray, rules: DriftRules,
                  labels: dict[int, str] | None = None) -> dict[str, Any]:
    """Segment mix and each segment's share: training counts (the assign rule on the training rows) vs batch.

    The mix: chi-square test of homogeneity on the 2 x k table (see ``_pearson_2xk``) with PSI over the
    segments as its effect size. Each segment: a two-sample test of its share (``share_test``), q-values by
    Benjamini-Hochberg over the segments, and |Cohen's h| as effect size. The block's status is the worst of
    the mix and the segments.
    """
    train = np.asarray(train_counts, dtype=np.int64)
    return segment_drift_of_counts(train, np.bincount(segments, minlength=train.size), rules, labels)


def segment_drift_of_counts(train_counts: np.ndarray, counts: np.ndarray, rules: DriftRules,
                            labels: dict[int, str] | None = None) -> dict[str, Any]:
    """``segment_drift`` from the batch's counts per segment (what a live window keeps)."""
    train = np.asarray(train_counts, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.int64)
    k = train.size
    n, n_train = int(counts.sum()), int(train.sum())
    chi2, p_value, method = _pearson_2xk(np.vstack([train, counts]))
    value_psi = psi(train, counts)
    mix_status = grade(p_value < rules.alpha, value_psi, rules.psi_watch, rules.psi_alert)
    labels = labels or {}
    share_p = [share_test(int(train[c]), n_train, int(counts[c]), n) for c in range(k)] if k > 1 else [1.0] * k
    share_q = bh_qvalues(share_p).tolist()
    items = []
    for c in range(k):
        expected, observed = train[c] / n_train, counts[c] / n
        h = cohens_h(observed, expected)
        items.append({
            "id": c,
            "label": labels.get(c),
            "expected_share": float(expected),
            "observed_share": float(observed),
            "expected_count": int(train[c]),
            "observed_count": int(counts[c]),
            "cohens_h": h,
            "p_value": share_p[c],
            "q_value": share_q[c],
            "status": grade(share_q[c] < rules.alpha, abs(h), rules.segment_h_watch, rules.segment_h_alert),
        })
    return {
        "expected_share": (train / n_train).tolist(),
        "observed_share": (counts / n).tolist(),
        "expected_count": train.tolist(),
        "observed_count": counts.tolist(),
        "psi": value_psi,
        "chi2": chi2,
        "p_value": p_value,
        "test": method,
        "mix_status": mix_status,
        "status": worst([mix_status] + [item["status"] for item in items]),
        "by_segment": items,
    }


def outlier_drift(baseline_count: int, baseline_total: int, flagged: np.ndarray, rules: DriftRules) -> dict[str, Any]:
    """Outlier rate: Fisher's exact test, one-sided (the batch rate is higher), against the held-out baseline.

    The baseline is the share of training rows flagged when scored by a model that did not see them (the
    fit's cross-fitting), so it is what fresh records of the training distribution show; its counts enter
    the 2 x 2 table as a second sample (``scipy.stats.fisher_exact``). One-sided because a falling outlier
    rate does not threaten the segments' meaning (and a feature gone constant, which lowers it, is caught
    per feature). ``rate_ratio`` is the batch rate over the Jeffreys-smoothed baseline (c + 0.5) / (n + 1). The
    status grades ``ratio_lower_bound``: the lower 2.5 % Jeffreys limit of the batch rate over the upper
    97.5 % Jeffreys limit of the baseline (Beta(c + 0.5, n - c + 0.5) quantiles), i.e. how large the increase
    is at least. Both sides are small counts (~10 flagged rows in a 1,000-row training set, ~5 expected in a
    500-row batch): a point ratio of 2 is then common with no drift at all (one training draw's thresholds
    can flag fresh records at twice the held-out figure; 12 flags where 5 are expected happen), and with the
    point ratio 5 of 600 null batches alerted (measured: ``make calibrate``).
    """
    return outlier_drift_of_counts(baseline_count, baseline_total, int(np.count_nonzero(flagged)), flagged.size,
                                   rules)


def outlier_drift_of_counts(baseline_count: int, baseline_total: int, count: int, n: int,
                            rules: DriftRules) -> dict[str, Any]:
    """``outlier_drift`` from the batch's flagged count ``count`` of ``n`` records (what a live window keeps)."""
    observed_rate = count / n
    table = [[count, n - count], [baseline_count, baseline_total - baseline_count]]
    p_value = 1.0 if count == 0 else _p(stats.fisher_exact(table, alternative="greater").pvalue)
    expected_rate = baseline_count / baseline_total if baseline_total else 0.0
    ratio = observed_rate / ((baseline_count + 0.5) / (baseline_total + 1.0))
    baseline_upper = float(stats.beta.ppf(0.975, baseline_count + 0.5, baseline_total - baseline_count + 0.5))
    batch_lower = float(stats.beta.ppf(0.025, count + 0.5, n - count + 0.5))
    graded = batch_lower / baseline_upper
    return {
        "expected_rate": float(expected_rate),
        "observed_rate": observed_rate,
        "expected_count": int(baseline_count),
        "expected_records": int(baseline_total),
        "observed_count": count,
        "rate_ratio": ratio,
        "ratio_lower_bound": graded,
        "p_value": p_value,
        "status": grade(p_value < rules.alpha, graded, rules.outlier_ratio_watch, rules.outlier_ratio_alert),
    }


def residual_drift(reference_residuals: np.ndarray, expected_median: float, residuals: np.ndarray,
                   available: bool, rules: DriftRules) -> dict[str, Any]:
    """PCA residual: one-sided Mann-Whitney U (batch residuals larger) against the stored sample.

    The stored sample holds HELD-OUT residuals (each training row scored by a PCA that did not see it):
    residuals of the rows a PCA was fitted on are biased low, and would make fresh data look drifted.

    Without a PCA residual (no PCA, or every component kept) the item is p 1 and stable. The effect
    size is the ratio of the batch median to the training median.
    """
    if not available or reference_residuals.size == 0:
        return {"expected_median": float(expected_median), "observed_median": 0.0, "median_ratio": None,
                "p_value": 1.0, "status": "stable", "available": False}
    observed_median = float(np.median(residuals))
    p_value = _p(stats.mannwhitneyu(residuals, reference_residuals, alternative="greater").pvalue)
    ratio = observed_median / expected_median if expected_median > 0 else None
    effect = ratio if ratio is not None else (math.inf if observed_median > 0 else 0.0)
    return {
        "expected_median": float(expected_median),
        "observed_median": observed_median,
        "median_ratio": ratio,
        "p_value": p_value,
        "status": grade(p_value < rules.alpha, effect, rules.residual_ratio_watch, rules.residual_ratio_alert),
        "available": True,
    }


# --------------------------------------------------------------------------- the report
def compute_drift(reference: ReferenceProfile, features: Sequence[str], values: np.ndarray,
                  assignment: Assignment, *, rules: DriftRules, residual_available: bool,
                  labels: dict[int, str] | None = None) -> dict[str, Any]:
    """Drift of a batch against a version's training reference.

    Parameters
    ----------
    reference : ReferenceProfile
    features : sequence of str, length n_features
    values : ndarray of shape (n_records, n_features)
        Raw batch values, NaN = missing (not imputed).
    assignment : Assignment
        The assign fast path's result for the imputed batch (segments, outlier flags, residuals).
    rules : DriftRules
    residual_available : bool
        Whether the version has a PCA residual (PCA that drops dimensions).
    labels : dict, optional
        Segment id -> label (the store's labels), echoed in the per-segment items.

    Returns
    -------
    dict
        ``n_records, status, features, segments, outliers, residual, rules``: the report without its
        identity fields (id, name, version, created_at), which the caller adds.
    """
    feature_rows = feature_drift(reference, features, values, rules)
    segments = segment_drift(reference.segment_counts, assignment.segment, rules, labels)
    outliers = outlier_drift(reference.outlier_count, reference.n_records, assignment.outlier, rules)
    residual = residual_drift(reference.residual_sample, reference.residual_median, assignment.residual,
                              residual_available, rules)
    status = worst([row["status"] for row in feature_rows] + [segments["status"], outliers["status"],
                                                               residual["status"]])
    return {
        "n_records": int(values.shape[0]),
        "status": status,
        "features": feature_rows,
        "segments": segments,
        "outliers": outliers,
        "residual": residual,
        "rules": rules.as_dict(),
    }


def drift_of_batch(bundle: Bundle, compiled: CompiledBundle, values: np.ndarray, rules: DriftRules,
                   labels: dict[int, str] | None = None) -> dict[str, Any]:
    """``compute_drift`` with the assignment done here (impute with training medians, fast path)."""
    filled, _ = impute(compiled, values)
    return compute_drift(bundle.reference, bundle.features, values, assign(compiled, filled), rules=rules,
                         residual_available=compiled.has_residual, labels=labels)
