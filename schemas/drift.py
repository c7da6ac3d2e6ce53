"""Drift report models. Contract fields (API.md, "Drift report") first in each model; additions after.

``allow_inf_nan=False`` everywhere: a NaN or Infinity reaching a report is a bug, and it fails here
rather than being written to the store or sent as an invalid JSON number.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from schemas.common import ErrorItem

Status = Literal["stable", "watch", "alert"]


class _Finite(BaseModel):
    model_config = ConfigDict(allow_inf_nan=False)


class MissingShare(_Finite):
    expected: float
    observed: float
    psi: float | None = None          # PSI over the two categories missing / present (the effect size)
    p_value: float | None = None      # Fisher exact test, training vs batch missing counts
    q_value: float | None = None      # Benjamini-Hochberg over the features' missing-share p-values


class FeatureDrift(_Finite):
    name: str
    psi: float                        # observed values on the feature's training bins (Jeffreys-smoothed)
    ks_statistic: float | None        # null in a live report (no values: see ``test``)
    p_value: float                    # two-sample KS against the stored training sample (live: ``test``)
    q_value: float                    # Benjamini-Hochberg over the features' KS p-values
    mean_shift_sd: float | None       # null when the training std is 0 or the batch has no observed value
    missing_share: MissingShare
    status: Status
    n_observed: int | None = None
    bins: Literal["categories", "quantiles"] | None = None  # by value (<= 20 distinct) or training deciles
    reasons: list[Literal["distribution", "missing_share"]] = []
    # Live reports only: the test on the binned counts that stands in for KS, and its statistic.
    test: Literal["chi-square on bins", "monte-carlo exact on bins", "none"] | None = None
    chi2: float | None = None


class SegmentShare(_Finite):
    """One segment's share, training vs batch (a two-sample test per segment, BH over the segments)."""

    id: int
    label: str | None = None          # the segment's label in the store, if any
    expected_share: float             # training rows of the segment (the assign rule) / training rows
    observed_share: float
    expected_count: int
    observed_count: int
    cohens_h: float                   # 2 asin sqrt(observed) - 2 asin sqrt(expected) (the effect size)
    p_value: float                    # 2 x 2 Pearson chi-square, or Fisher exact for small expected counts
    q_value: float                    # Benjamini-Hochberg over the segments
    status: Status


class SegmentDrift(_Finite):
    expected_share: list[float]
    observed_share: list[float]
    psi: float                        # over the segments, Jeffreys-smoothed shares
    chi2: float                       # Pearson's statistic of the 2 x k training-vs-batch table
    p_value: float                    # chi-square test of homogeneity (or its Monte Carlo exact version)
    status: Status                    # the worst of the mix and the segments
    observed_count: list[int] | None = None
    expected_count: list[int] | None = None   # training counts (the assign rule on the training rows)
    test: Literal["chi-square", "monte-carlo exact", "none"] | None = None
    mix_status: Status | None = None  # the mix alone (chi-square and PSI)
    by_segment: list[SegmentShare] = []


class OutlierDrift(_Finite):
    expected_rate: float              # held-out flag rate of the training rows (the drift baseline)
    observed_rate: float
    p_value: float                    # Fisher exact, one-sided (rate went up), batch vs held-out counts
    status: Status
    observed_count: int | None = None
    expected_count: int | None = None     # held-out training rows flagged
    expected_records: int | None = None   # held-out training rows scored
    rate_ratio: float | None = None   # observed / Jeffreys-smoothed training rate
    ratio_lower_bound: float | None = None  # lower 2.5 % Jeffreys limit of the batch rate / upper 97.5 % of
    #                                          the training rate: the graded effect size
    observed_by_reason: dict[Literal["distance", "residual"], int] | None = None   # live reports only


class ResidualDrift(_Finite):
    expected_median: float            # median held-out training residual
    observed_median: float
    p_value: float                    # Mann-Whitney U, one-sided, vs held-out training residuals
    status: Status
    median_ratio: float | None = None
    available: bool = True            # false without a PCA residual (then p 1, stable)
    test: Literal["mann-whitney on bins", "none"] | None = None   # live reports only


class DriftRules(_Finite):
    alpha: float
    psi_watch: float
    psi_alert: float
    outlier_ratio_watch: float
    outlier_ratio_alert: float
    residual_ratio_watch: float
    residual_ratio_alert: float
    segment_h_watch: float | None = None
    segment_h_alert: float | None = None
    smoothing: str | None = None      # "jeffreys": PSI shares (c + 0.5) / (n + bins / 2)
    psi_floor: float | None = None    # reports written before the smoothing used a fixed floor


class ChangedTest(BaseModel):
    item: str
    batch_test: str
    live_test: str


class LiveWindow(_Finite):
    """What a live report covers: the records assigned in whole time buckets from ``from`` to ``to``."""

    model_config = ConfigDict(allow_inf_nan=False, populate_by_name=True)

    window: str                       # as asked, e.g. "1h"
    window_seconds: int
    from_: str = Field(alias="from")  # start of the first bucket counted (ISO-8601 UTC)
    to: str
    bucket_seconds: int
    n_records: int
    tests_changed: list[ChangedTest]  # which tests differ from a batch report, because only counts exist


class DriftReport(_Finite):
    id: str
    name: str
    version: int
    created_at: str
    n_records: int
    status: Status
    features: list[FeatureDrift]
    segments: SegmentDrift
    outliers: OutlierDrift
    residual: ResidualDrift
    rules: DriftRules | None = None   # the thresholds this report was graded with
    skipped_records: int = 0          # bad records left out with ?on_error=skip
    errors: list[ErrorItem] = []      # the first of them (at most 200)
    live: LiveWindow | None = None    # live reports only (GET .../drift/live)


class DriftReportList(BaseModel):
    reports: list[DriftReport]
