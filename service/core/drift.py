"""Drift: how far a batch of records has moved from a version's training distribution.

Every item of a report pairs a significance test with an effect size, and its status needs both:

============  =================================================  ======================================
item          significance (below ``alpha``)                      materiality (watch / alert)
============  =================================================  ======================================
feature       KS q-value (Benjamini-Hochberg over the features)   PSI on the training decile bins
feature       missing share: Fisher exact test, BH q-value        PSI on the two categories missing /
                                                                  present
segment mix   Pearson chi-square goodness of fit                  PSI over the segments
outlier rate  exact binomial test, one-sided (rate went up)       observed / training rate
residual      Mann-Whitney U, one-sided (residuals went up)       observed / training median residual
============  =================================================  ======================================

``stable`` unless significant; then ``alert`` at or above the alert effect size, ``watch`` at or above
the watch one. A feature's status is the worse of its two rows. The report's status is the worst item.
The significance gate keeps small, noisy batches quiet; the effect-size gate keeps huge batches from
alarming on shifts too small to matter (with 10^5 rows almost any shift is "significant").

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

# Share given to an empty category before taking ln(o / e) in a PSI: 1e-4 (0.01 %). Training decile bins
# are never empty, so in practice it acts on the batch side; an empty batch decile then adds
# 0.1 * ln(0.1 / 1e-4) ~ 0.69 to the PSI, which is "shifted" on its own, as it should be. Shares are
# floored, not renormalised (common practice, no single source).
PSI_FLOOR = 1e-4

STATUSES = ("stable", "watch", "alert")
_RANK = {status: i for i, status in enumerate(STATUSES)}


@dataclass(frozen=True)
class DriftRules:
    """Thresholds of the status rule (see the module docstring).

    PSI bands 0.10 / 0.25 are common practice in credit scoring (Siddiqi, *Credit Risk Scorecards*,
    2006; quoted from memory). The ratio thresholds have no standard source; they are settings.
    """

    alpha: float = 0.01
    psi_watch: float = 0.10
    psi_alert: float = 0.25
    outlier_ratio_watch: float = 1.5
    outlier_ratio_alert: float = 2.0
    residual_ratio_watch: float = 1.2
    residual_ratio_alert: float = 1.5

    def as_dict(self) -> dict[str, float]:
        return {**asdict(self), "psi_floor": PSI_FLOOR}


# --------------------------------------------------------------------------- small pieces
def psi(expected: np.ndarray, observed: np.ndarray, floor: float = PSI_FLOOR) -> float:
    """Population stability index of ``observed`` against ``expected``.

    Parameters
    ----------
    expected, observed : array of shape (n_categories,)
        Counts or shares per category; each is normalised to shares first.
    floor : float
        Share given to empty categories so that the logarithm stays finite.

    Returns
    -------
    float
        ``sum_i (o_i - e_i) * ln(o_i / e_i)``, 0 when either side has no mass.
    """
    e = np.asarray(expected, dtype=np.float64)
    o = np.asarray(observed, dtype=np.float64)
    if e.sum() <= 0 or o.sum() <= 0:
        return 0.0
    e = np.maximum(e / e.sum(), floor)
    o = np.maximum(o / o.sum(), floor)
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
    nulls alerts through ``missing_share`` even when the values that do arrive look normal. With the
    default bands, a feature never missing in training reaches "watch" at about 2 % missing and
    "alert" at about 4.2 % (the 1e-4 floor sets these); one 5 % missing in training alerts at about 21 %.
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
        statistic, p_value = ks_test(observed, ref_sample)
        value_psi = (psi(reference.bin_counts[j], _counts_of_sorted(reference.bin_edges[j], observed))
                     if observed.size else 0.0)
        std = float(reference.stds[j])
        shift = (float(observed.mean()) - float(reference.means[j])) / std if observed.size and std > 0 else None
        expected_missing = float(reference.missing_share[j])
        observed_missing = float(n_missing[j]) / n
        train_missing = int(round(expected_missing * train_n))
        missing_p = missing_test(train_missing, train_n, int(n_missing[j]), n)
        missing_psi = psi([expected_missing, 1.0 - expected_missing], [observed_missing, 1.0 - observed_missing])
        ks_p.append(p_value)
        miss_p.append(missing_p)
        rows.append({
            "name": name,
            "psi": value_psi,
            "ks_statistic": statistic,
            "p_value": p_value,
            "q_value": None,
            "mean_shift_sd": _finite_or_none(shift) if shift is not None else None,
            "n_observed": int(observed.size),
            "missing_share": {"expected": expected_missing, "observed": observed_missing, "psi": missing_psi,
                              "p_value": missing_p, "q_value": None},
        })
    # Two families, each adjusted over the features of this report: value distributions and missing shares.
    ks_q, miss_q = bh_qvalues(ks_p), bh_qvalues(miss_p)
    for row, q, mq in zip(rows, ks_q.tolist(), miss_q.tolist()):
        row["q_value"] = q
        row["missing_share"]["q_value"] = mq
        by_values = grade(q < rules.alpha, row["psi"], rules.psi_watch, rules.psi_alert)
        by_missing = grade(mq < rules.alpha, row["missing_share"]["psi"], rules.psi_watch, rules.psi_alert)
        row["status"] = worst([by_values, by_missing])
        row["reasons"] = [reason for reason, status in (("distribution", by_values), ("missing_share", by_missing))
                          if status != "stable"]
    return rows


def segment_drift(expected_shares: np.ndarray, segments: np.ndarray, rules: DriftRules) -> dict[str, Any]:
    """Segment mix: training vs batch shares by nearest centroid, PSI and Pearson chi-square.

    Expected counts for the chi-square use the training shares with empty segments floored at
    ``PSI_FLOOR`` and renormalised (identical to the raw shares when no segment is empty), so that a
    segment the training data never reached cannot divide by zero. With one segment there is nothing
    to compare: chi2 0, p 1.
    """
    k = expected_shares.size
    n = segments.size
    counts = np.bincount(segments, minlength=k)
    expected = np.asarray(expected_shares, dtype=np.float64)
    value_psi = psi(expected, counts)
    if k < 2:
        chi2, p_value = 0.0, 1.0
    else:
        floored = np.maximum(expected, PSI_FLOOR) if np.any(expected <= 0) else expected
        result = stats.chisquare(counts, n * floored / floored.sum())
        chi2, p_value = float(result.statistic), _p(result.pvalue)
    return {
        "expected_share": expected.tolist(),
        "observed_share": (counts / n).tolist(),
        "observed_count": counts.tolist(),
        "psi": value_psi,
        "chi2": chi2,
        "p_value": p_value,
        "status": grade(p_value < rules.alpha, value_psi, rules.psi_watch, rules.psi_alert),
    }


def outlier_drift(expected_rate: float, flagged: np.ndarray, rules: DriftRules) -> dict[str, Any]:
    """Outlier rate: exact binomial test that the batch rate exceeds the training rate.

    One-sided because a falling outlier rate does not threaten the segments' meaning (and a feature
    gone constant, which lowers it, is caught per feature). The effect size is the rate ratio, with a
    training rate of 0 floored at ``PSI_FLOOR``.
    """
    n = flagged.size
    count = int(np.count_nonzero(flagged))
    observed_rate = count / n
    p_value = _p(stats.binomtest(count, n, min(max(expected_rate, 0.0), 1.0), alternative="greater").pvalue)
    ratio = observed_rate / max(expected_rate, PSI_FLOOR)
    return {
        "expected_rate": float(expected_rate),
        "observed_rate": observed_rate,
        "observed_count": count,
        "rate_ratio": ratio,
        "p_value": p_value,
        "status": grade(p_value < rules.alpha, ratio, rules.outlier_ratio_watch, rules.outlier_ratio_alert),
    }


def residual_drift(reference_residuals: np.ndarray, expected_median: float, residuals: np.ndarray,
                   available: bool, rules: DriftRules) -> dict[str, Any]:
    """PCA residual: one-sided Mann-Whitney U (batch residuals larger) against the stored sample.

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
                  assignment: Assignment, *, rules: DriftRules, residual_available: bool) -> dict[str, Any]:
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

    Returns
    -------
    dict
        ``n_records, status, features, segments, outliers, residual, rules``: the report without its
        identity fields (id, name, version, created_at), which the caller adds.
    """
    feature_rows = feature_drift(reference, features, values, rules)
    segments = segment_drift(reference.segment_shares, assignment.segment, rules)
    outliers = outlier_drift(reference.outlier_rate, assignment.outlier, rules)
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


def drift_of_batch(bundle: Bundle, compiled: CompiledBundle, values: np.ndarray, rules: DriftRules) -> dict[str, Any]:
    """``compute_drift`` with the assignment done here (impute with training medians, fast path)."""
    filled, _ = impute(compiled, values)
    return compute_drift(bundle.reference, bundle.features, values, assign(compiled, filled), rules=rules,
                         residual_available=compiled.has_residual)
