"""A drift report from a window's counts: the batch report's items and status rules, on binned counts only.

What changes because only counts on bins exist (``TESTS_CHANGED``, echoed in every live report):

* feature values: the two-sample KS test needs the values; in its place the chi-square test of homogeneity
  of the 2 x bins table (training counts on the feature's bins vs the window's), Monte Carlo exact when an
  expected count is under 5 (``service.core.drift._pearson_2xk``, the segment mix's test). PSI is computed on
  the same bins from the same counts as in a batch report, so it is the same figure. ``mean_shift_sd`` is
  null (a mean needs the values).
* residual: Mann-Whitney U, one-sided, on the binned residuals (training residual quantiles; records in one
  bin are ties, with the tie-corrected normal approximation). The observed median is read off the histogram
  by linear interpolation within its bin (a lower bound when it falls in the open top bin).

Unchanged (they only ever needed counts): missing shares (Fisher), the segment mix and each segment's share,
the outlier rate.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import stats

from service.core.drift import (
    DriftRules,
    _pearson_2xk,
    grade_feature_rows,
    grade,
    missing_test,
    outlier_drift_of_counts,
    psi,
    segment_drift_of_counts,
    worst,
)
from service.live.counts import CountLayout, WindowCounts

TESTS_CHANGED = [
    {"item": "features", "batch_test": "two-sample Kolmogorov-Smirnov on the values",
     "live_test": "chi-square test of homogeneity on the training bins (Monte Carlo exact for small expected "
                  "counts); mean_shift_sd is null"},
    {"item": "residual", "batch_test": "Mann-Whitney U on the residuals",
     "live_test": "Mann-Whitney U on the residuals binned at the training residual quantiles (ties by bin); the "
                  "observed median is interpolated within its bin"},
]


def binned_mann_whitney_greater(sample_counts: np.ndarray, reference_counts: np.ndarray) -> float:
    """One-sided p-value that the first sample is stochastically larger, from counts on shared ordered bins.

    Values within one bin are ties. U of the first sample counts, for each of its values, the reference values
    below it plus half of those tied with it; the p-value is the normal approximation with the tie-corrected
    variance and a continuity correction of 0.5, which is what ``scipy.stats.mannwhitneyu(x, y,
    alternative='greater', method='asymptotic')`` computes on the expanded samples (Mann & Whitney 1947; the
    tie correction as in scipy's documentation).
    """
    x = np.asarray(sample_counts, dtype=np.float64)
    y = np.asarray(reference_counts, dtype=np.float64)
    n1, n2 = x.sum(), y.sum()
    if n1 == 0 or n2 == 0:
        return 1.0
    below = np.concatenate(([0.0], np.cumsum(y)[:-1]))
    u = float(np.sum(x * (below + 0.5 * y)))
    ties = x + y
    n = n1 + n2
    variance = n1 * n2 / 12.0 * ((n + 1) - np.sum(ties ** 3 - ties) / (n * (n - 1)))
    if variance <= 0:
        return 1.0
    z = (u - n1 * n2 / 2.0 - 0.5) / math.sqrt(variance)
    return float(stats.norm.sf(z))


def histogram_median(counts: np.ndarray, edges: np.ndarray) -> float:
    """Median of values binned on (e[i-1], e[i]] (first bin from 0), linear within the median's bin."""
    total = counts.sum()
    if total == 0:
        return 0.0
    cumulative = np.cumsum(counts)
    b = int(np.searchsorted(cumulative, total / 2.0, side="left"))
    if b >= edges.size:                         # open top bin: its lower edge is a lower bound
        return float(edges[-1]) if edges.size else 0.0
    low = 0.0 if b == 0 else float(edges[b - 1])
    before = 0.0 if b == 0 else float(cumulative[b - 1])
    share = (total / 2.0 - before) / counts[b] if counts[b] else 0.0
    return float(low + share * (float(edges[b]) - low))


def live_feature_drift(reference, features, counts: WindowCounts, rules: DriftRules) -> list[dict[str, Any]]:
    """Per-feature rows, as ``service.core.drift.feature_drift`` but on bin counts (see the module docstring)."""
    n, train_n = counts.n_records, reference.n_records
    rows, value_p, miss_p = [], [], []
    for j, name in enumerate(features):
        observed = counts.feature_bins[j]
        n_observed = int(observed.sum())
        training = np.asarray(reference.bin_counts[j], dtype=np.int64)
        chi2, p_value, method = _pearson_2xk(np.vstack([training, observed]))
        value_psi = psi(training, observed) if n_observed else 0.0
        n_missing = int(counts.feature_missing[j])
        train_missing = int(reference.missing_count[j])
        missing_p = missing_test(train_missing, train_n, n_missing, n)
        value_p.append(p_value)
        miss_p.append(missing_p)
        rows.append({
            "name": name, "psi": value_psi, "bins": reference.bin_kinds[j],
            "ks_statistic": None, "test": f"{method} on bins" if method != "none" else "none",
            "chi2": chi2, "p_value": p_value, "q_value": None, "mean_shift_sd": None, "n_observed": n_observed,
            "missing_share": {"expected": train_missing / train_n, "observed": n_missing / n,
                              "psi": psi([train_missing, train_n - train_missing], [n_missing, n - n_missing]),
                              "p_value": missing_p, "q_value": None},
        })
    return grade_feature_rows(rows, value_p, miss_p, rules)


def live_residual_drift(reference, layout: CountLayout, counts: WindowCounts, available: bool,
                        rules: DriftRules) -> dict[str, Any]:
    expected_median = float(reference.residual_median)
    if not available or not layout.residual_bins or reference.residual_sample.size == 0:
        return {"expected_median": expected_median, "observed_median": 0.0, "median_ratio": None, "p_value": 1.0,
                "status": "stable", "available": False, "test": "none"}
    training = np.bincount(np.searchsorted(layout.residual_edges, reference.residual_sample, side="left"),
                           minlength=layout.residual_bins)
    p_value = binned_mann_whitney_greater(counts.residual_bins, training)
    observed_median = histogram_median(counts.residual_bins, layout.residual_edges)
    ratio = observed_median / expected_median if expected_median > 0 else None
    effect = ratio if ratio is not None else (math.inf if observed_median > 0 else 0.0)
    return {"expected_median": expected_median, "observed_median": observed_median, "median_ratio": ratio,
            "p_value": p_value, "available": True, "test": "mann-whitney on bins",
            "status": grade(p_value < rules.alpha, effect, rules.residual_ratio_watch, rules.residual_ratio_alert)}


def compute_live_drift(reference, features, layout: CountLayout, counts: WindowCounts, *, rules: DriftRules,
                       residual_available: bool, labels: dict[int, str] | None = None) -> dict[str, Any]:
    """The body of a live drift report (no identity or window fields; the caller adds them)."""
    feature_rows = live_feature_drift(reference, features, counts, rules)
    segments = segment_drift_of_counts(reference.segment_counts, counts.segments, rules, labels)
    outliers = outlier_drift_of_counts(int(reference.outlier_count), int(reference.n_records), counts.flagged,
                                       counts.n_records, rules)
    outliers["observed_by_reason"] = {"distance": counts.far, "residual": counts.off_plane}
    residual = live_residual_drift(reference, layout, counts, residual_available, rules)
    status = worst([row["status"] for row in feature_rows] + [segments["status"], outliers["status"],
                                                               residual["status"]])
    return {"n_records": counts.n_records, "status": status, "features": feature_rows, "segments": segments,
            "outliers": outliers, "residual": residual, "rules": rules.as_dict()}
