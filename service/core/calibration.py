"""Held-out, per-segment outlier thresholds (split-conformal, cross-fitted).

Why held out: a training row's distance to a centroid fitted on it, and its residual from a PCA fitted on
it, are biased low compared with a fresh record's, so in-sample quantiles flag fresh records too often
(worst for small segments and for PCA with many features per row). Here every training row is scored once
by a model that did not see it.

How (see README, "Outlier flag"):

1. Cross-fitting. The training rows are split into ``N_FOLDS`` folds, stratified by segment (seeded). For
   each fold the imputer, the scaler and PCA (the final model's component count) are refitted on the other
   folds; the centroids start from the other folds' member means of each segment (the final clusterer's
   labels, so segment ids match) and, for k-means, are refined by Lloyd iterations (``KMeans`` with that
   initialisation, ``n_init=1``); agglomerative centroids stay the member means, as in the final model.
2. One score per row. The row's segment is the final model's assignment (nearest centroid), the same one
   the fit report's sizes and the drift baseline use. Its held-out score is
   ``s = max(distance / D_c, residual / R_c)``: the two rules combined into one score, each scaled by the
   segment's median in-sample distance D_c and residual R_c of the fold's own training rows (so the score
   is fixed before the held-out rows are seen).
3. Conformal threshold. Per segment, with n_c held-out scores, the multiplier ``t_c`` is the
   ``ceil((n_c + 1) q)``-th smallest score (Vovk, Gammerman & Shafer 2005; Lei et al., JASA 2018): a fresh
   record of the segment then has ``s > t_c`` with probability at most ``1 - q`` (at least
   ``1 - q - 1/(n_c + 1)`` for continuous scores). Segments with fewer than ``2 / (1 - q)`` held-out rows
   (200 at q = 0.99) borrow strength: they use the pooled multiplier of all held-out scores (the scores are
   already in units of each segment's own medians), valid on average over such segments.
4. The final model's thresholds are ``distance_threshold_c = t_c D_c`` and ``residual_threshold_c = t_c R_c``
   with D_c, R_c the final model's in-sample medians: a record is flagged when either is exceeded, which
   is ``s > t_c``. So the nominal rate is ``1 - q`` per segment and per record, for the union of the two rules.
5. Drift baseline: each held-out row is flagged when its score exceeds the conformal multiplier of the
   other rows of its segment (leave one out), i.e. judged as a fresh record would be; the count of those
   rows over n is the outlier item's training rate, and both counts enter its two-sample test.

With fewer than ``MIN_CROSS_FIT_ROWS`` training rows there is nothing to hold out: the scores are in-sample
(and the report says so). When a segment (or the pool) has fewer than ``q / (1 - q)`` scores the rank
exceeds n and the largest score is used: coverage ``n / (n + 1)`` < q, stated in the report.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.cluster import KMeans
from sklearn.decomposition import PCA
from sklearn.impute import SimpleImputer

N_FOLDS = 5
MIN_CROSS_FIT_ROWS = 20
# A segment's median in-sample score is its own when it has at least this many rows in the fold's
# training part, else the fold's overall median (common practice: a median of a handful of rows is noise).
MIN_MEDIAN_ROWS = 5


@dataclass(frozen=True)
class Calibration:
    """Thresholds and the held-out figures the drift baseline needs (plain arrays)."""

    distance_thresholds: np.ndarray   # (k,)
    residual_thresholds: np.ndarray   # (k,) 0 without a residual
    multipliers: np.ndarray           # (k,) t_c
    borrowed: np.ndarray              # (k,) bool: the pooled multiplier was used
    held_out_counts: np.ndarray       # (k,) int: held-out scores per segment
    flagged: np.ndarray               # (n,) bool: held-out score above its segment's leave-one-out multiplier
    residuals: np.ndarray             # (n,) held-out residuals (0 without a residual)
    pooled_residual_threshold: float  # conformal q-quantile of all held-out residuals (for comparison)
    held_out: bool                    # False: too few rows, in-sample scores

    def as_report(self, q: float) -> dict[str, Any]:
        return {
            "method": "cross-fitted split-conformal" if self.held_out else "in-sample (too few rows to hold out)",
            "folds": N_FOLDS if self.held_out else 1,
            "score": "max(distance / segment median distance, residual / segment median residual)",
            "nominal_rate": 1.0 - q,
            "own_threshold_min_rows": min_own_rows(q),
            "held_out_flag_rate": float(self.flagged.mean()) if self.flagged.size else 0.0,
            "held_out_flag_count": int(self.flagged.sum()),
            "held_out_rows": int(self.flagged.size),
        }


def min_own_rows(q: float) -> int:
    """Held-out rows a segment needs for its own threshold: 2 / (1 - q) (200 at q = 0.99; our choice)."""
    return int(math.ceil(2.0 / (1.0 - q) - 1e-9))


def conformal_quantile(scores: np.ndarray, q: float) -> float:
    """The ceil((n + 1) q)-th smallest score (split-conformal rank); the largest when that rank exceeds n."""
    n = scores.size
    if n == 0:
        return 0.0
    rank = min(int(math.ceil((n + 1) * q - 1e-9)), n)       # 1-based; the epsilon absorbs (n + 1) q rounding
    return float(np.partition(scores, rank - 1)[rank - 1])


def leave_one_out_exceeds(scores: np.ndarray, q: float) -> np.ndarray:
    """(n,) bool: each score above the conformal quantile of the OTHER n - 1 scores.

    This is the held-out flag of each calibration row as if it were a fresh record: its count is
    n - ceil(n q) (about n (1 - q)), where counting the rows above the quantile of all n scores gives
    n - ceil((n + 1) q), one fewer row, which biases a drift baseline low by up to 1 / n (25 % at n = 400,
    q = 0.99). Ties count as not above.
    """
    n = scores.size
    if n < 2:
        return np.zeros(n, dtype=bool)
    rank = min(int(math.ceil(n * q - 1e-9)), n - 1)             # rank among the n - 1 others (1-based)
    ordered = np.sort(scores)
    position = np.argsort(np.argsort(scores, kind="stable"), kind="stable")   # 0-based rank of each score
    # Without row i, the rank-th smallest of the others is ordered[rank - 1] when i sits above it, else ordered[rank].
    threshold = np.where(position >= rank, ordered[rank - 1], ordered[min(rank, n - 1)])
    return scores > threshold


def segment_medians(scores: np.ndarray, segments: np.ndarray, k: int) -> np.ndarray:
    """(k,) median score per segment; segments with few rows (or a zero median) take the overall median."""
    overall = float(np.median(scores)) if scores.size else 0.0
    if overall <= 0:
        positive = scores[scores > 0]
        overall = float(np.median(positive)) if positive.size else 1.0
    out = np.full(k, overall)
    for c in range(k):
        own = scores[segments == c]
        if own.size >= MIN_MEDIAN_ROWS:
            median = float(np.median(own))
            if median > 0:
                out[c] = median
    return out


def _folds(segments: np.ndarray, seed: int) -> np.ndarray:
    """Fold number of each row, stratified by segment (seeded)."""
    order = np.random.default_rng(seed).permutation(segments.size)
    order = order[np.argsort(segments[order], kind="stable")]
    fold = np.empty(segments.size, dtype=np.intp)
    fold[order] = np.arange(segments.size) % N_FOLDS
    return fold


def _fold_scores(values, train, test, *, scaler_cls, n_components, method, labels, segments, raw_centroids, k,
                 seed):
    """Fit the steps on ``train``; return held-out (distance, residual) of ``test`` and in-sample ones of ``train``."""
    imputer = SimpleImputer(strategy="median", keep_empty_features=True).fit(values[train])
    imputed = imputer.transform(values)
    scaler = scaler_cls().fit(imputed[train]) if scaler_cls is not None else None
    scaled = imputed if scaler is None else scaler.transform(imputed)
    pca = None
    space = scaled
    if n_components is not None:
        pca = PCA(n_components=min(n_components, train.size, scaled.shape[1]), svd_solver="full",
                  random_state=seed).fit(scaled[train])
        space = pca.transform(scaled)
    # Segment ids must match the final model's: start from the member means of the final clusterer's labels
    # among the training part; a segment with no member there starts from the final centroid.
    fallback = raw_centroids if scaler is None else scaler.transform(raw_centroids)
    fallback = fallback if pca is None else pca.transform(fallback)
    centroids = fallback.copy()
    for c in range(k):
        members = train[labels[train] == c]
        if members.size:
            centroids[c] = space[members].mean(axis=0)
    if method == "kmeans" and k > 1 and train.size >= k:
        centroids = KMeans(n_clusters=k, init=centroids, n_init=1, random_state=seed).fit(space[train]).cluster_centers_
    distance = np.linalg.norm(space - centroids[segments], axis=1)
    if pca is not None and pca.n_components_ < scaled.shape[1]:
        centred = scaled - pca.mean_
        residual = np.linalg.norm(centred - (centred @ pca.components_.T) @ pca.components_, axis=1)
    else:
        residual = np.zeros(values.shape[0])
    return distance, residual


def calibrate(values: np.ndarray, *, segments: np.ndarray, labels: np.ndarray, raw_centroids: np.ndarray,
              in_sample_distance: np.ndarray, in_sample_residual: np.ndarray, has_residual: bool, scaler_cls,
              n_components: int | None, method: str, q: float, seed: int) -> Calibration:
    """Per-segment thresholds of the final model (see the module docstring).

    Parameters
    ----------
    values : (n, p) raw training matrix, NaN = missing
    segments : (n,) the final model's assignment (nearest centroid) of each training row
    labels : (n,) the final clusterer's own labels (start of each fold's centroids)
    raw_centroids : (k, p) the final centroids in imputed raw units (a fold's start for an empty segment)
    in_sample_distance, in_sample_residual : (n,) the final model's scores of the training rows
    has_residual : whether PCA drops dimensions
    scaler_cls, n_components, method : the final model's steps (class, PCA count or None, clusterer kind)
    """
    n = values.shape[0]
    k = raw_centroids.shape[0]
    held_out = n >= MIN_CROSS_FIT_ROWS
    if held_out:
        distance, residual = np.empty(n), np.empty(n)
        d_scale, r_scale = np.empty(n), np.empty(n)
        fold = _folds(segments, seed)
        rows = np.arange(n)
        # Fold fits on a few hundred rows can hit degenerate corners (a constant column in a fold, fewer
        # distinct points than segments); scikit-learn's warnings about them do not change the scores' meaning.
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore")
            for f in range(N_FOLDS):
                train, test = rows[fold != f], rows[fold == f]
                if test.size == 0:
                    continue
                fd, fr = _fold_scores(values, train, test, scaler_cls=scaler_cls, n_components=n_components,
                                      method=method, labels=labels, segments=segments, raw_centroids=raw_centroids,
                                      k=k, seed=seed)
                distance[test], residual[test] = fd[test], fr[test]
                d_scale[test] = segment_medians(fd[train], segments[train], k)[segments[test]]
                r_scale[test] = segment_medians(fr[train], segments[train], k)[segments[test]]
    else:
        distance, residual = in_sample_distance.copy(), in_sample_residual.copy()
        d_scale = segment_medians(distance, segments, k)[segments]
        r_scale = segment_medians(residual, segments, k)[segments]
    return calibrate_scores(distance, residual, d_scale, r_scale, segments=segments, k=k,
                            in_sample_distance=in_sample_distance, in_sample_residual=in_sample_residual,
                            has_residual=has_residual, q=q, held_out=held_out)


def calibrate_scores(distance: np.ndarray, residual: np.ndarray, d_scale: np.ndarray, r_scale: np.ndarray, *,
                     segments: np.ndarray, k: int, in_sample_distance: np.ndarray, in_sample_residual: np.ndarray,
                     has_residual: bool, q: float, held_out: bool) -> Calibration:
    """Steps 2-5 of the module docstring, from each row's held-out distance and residual and the scales of its
    fold (also the out-of-core engine's entry, which computes those in streaming passes)."""
    n = segments.size
    if not has_residual:
        residual = np.zeros(n)
    score = distance / d_scale
    if has_residual:
        score = np.maximum(score, residual / r_scale)

    counts = np.bincount(segments, minlength=k)
    pooled = conformal_quantile(score, q)
    own_rows = min_own_rows(q)
    borrowed = counts < own_rows
    multipliers = np.array([pooled if borrowed[c] else conformal_quantile(score[segments == c], q)
                            for c in range(k)])
    final_d = segment_medians(in_sample_distance, segments, k)
    final_r = segment_medians(in_sample_residual, segments, k) if has_residual else np.zeros(k)
    flagged = np.zeros(n, dtype=bool)
    pooled_flags = leave_one_out_exceeds(score, q)
    for c in range(k):
        members = segments == c
        flagged[members] = pooled_flags[members] if borrowed[c] else leave_one_out_exceeds(score[members], q)
    return Calibration(
        distance_thresholds=multipliers * final_d,
        residual_thresholds=multipliers * final_r,
        multipliers=multipliers,
        borrowed=borrowed,
        held_out_counts=counts,
        flagged=flagged,
        residuals=residual,
        pooled_residual_threshold=conformal_quantile(residual, q) if has_residual else 0.0,
        held_out=held_out,
    )
