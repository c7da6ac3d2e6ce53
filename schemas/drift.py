"""Drift report models. Contract fields (API.md, "Drift report") first in each model; additions after.

``allow_inf_nan=False`` everywhere: a NaN or Infinity reaching a report is a bug, and it fails here
rather than being written to the store or sent as an invalid JSON number.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict

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
    psi: float                        # observed values on the training decile bins
    ks_statistic: float
    p_value: float                    # two-sample KS against the stored training sample
    q_value: float                    # Benjamini-Hochberg over the features' KS p-values
    mean_shift_sd: float | None       # null when the training std is 0 or the batch has no observed value
    missing_share: MissingShare
    status: Status
    n_observed: int | None = None
    reasons: list[Literal["distribution", "missing_share"]] = []


class SegmentDrift(_Finite):
    expected_share: list[float]
    observed_share: list[float]
    psi: float
    chi2: float
    p_value: float
    status: Status
    observed_count: list[int] | None = None


class OutlierDrift(_Finite):
    expected_rate: float
    observed_rate: float
    p_value: float                    # exact binomial test, one-sided (rate went up)
    status: Status
    observed_count: int | None = None
    rate_ratio: float | None = None   # observed / training rate (training rate floored at 1e-4)


class ResidualDrift(_Finite):
    expected_median: float
    observed_median: float
    p_value: float                    # Mann-Whitney U, one-sided (batch residuals larger)
    status: Status
    median_ratio: float | None = None
    available: bool = True            # false without a PCA residual (then p 1, stable)


class DriftRules(_Finite):
    alpha: float
    psi_watch: float
    psi_alert: float
    outlier_ratio_watch: float
    outlier_ratio_alert: float
    residual_ratio_watch: float
    residual_ratio_alert: float
    psi_floor: float


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


class DriftReportList(BaseModel):
    reports: list[DriftReport]
