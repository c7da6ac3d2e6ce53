from __future__ import annotations

from typing import Literal

from pydantic import BaseModel

Status = Literal["stable", "watch", "alert"]


class MissingShare(BaseModel):
    expected: float
    observed: float


class FeatureDrift(BaseModel):
    name: str
    psi: float
    ks_statistic: float
    p_value: float
    q_value: float
    mean_shift_sd: float | None
    missing_share: MissingShare
    status: Status


class SegmentDrift(BaseModel):
    expected_share: list[float]
    observed_share: list[float]
    psi: float
    chi2: float
    p_value: float
    status: Status


class OutlierDrift(BaseModel):
    expected_rate: float
    observed_rate: float
    p_value: float
    status: Status


class ResidualDrift(BaseModel):
    expected_median: float
    observed_median: float
    p_value: float
    status: Status


class DriftReport(BaseModel):
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


class DriftReportList(BaseModel):
    reports: list[DriftReport]
