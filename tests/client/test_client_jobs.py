"""The Python client's background fits: ``fit(background=True, progress=...)``, ``jobs``, ``job``,
``job_report``, ``cancel_job`` and ``JobFailed``, against the app in this process (a TestClient as transport).
The data is scikit-learn's wine data set."""

from __future__ import annotations

import pandas as pd
import pytest

from segscore.client import Client, Conflict, InvalidInput, JobFailed, NotFound
from service.jobs import runner as job_runner

NAME = "wines"


@pytest.fixture
def api(client, monkeypatch):
    monkeypatch.setattr(job_runner, "PROGRESS_WRITE_SECONDS", 0.0)
    return Client(http=client)


@pytest.fixture
def wine_frame(wine) -> pd.DataFrame:
    return pd.DataFrame(wine.data, columns=wine.feature_names)


def test_a_background_fit_returns_the_report_a_synchronous_fit_returns(api, wine_frame):
    synchronous = api.fit("sync", wine_frame, k=(2, 5), seed=3)
    moves = []
    background = api.fit("background", wine_frame, k=(2, 5), seed=3, background=True,
                         progress=lambda step, fraction: moves.append((step, fraction)))
    assert background["data_sha256"] == synchronous["data_sha256"]
    assert background["segments"] == synchronous["segments"]
    assert background == api.version("background", 1)
    fractions = [fraction for _, fraction in moves]
    assert fractions == sorted(fractions) and fractions[-1] == 1.0
    assert moves[-1][0] == "saving"


def test_records_in_the_background_and_the_job_listing(api, wine):
    records = [dict(zip(wine.feature_names, map(float, row))) for row in wine.data]
    job = api.fit(NAME, records, k=3, background=True, wait=False)
    assert job["state"] in ("queued", "running") and job["segmentation"] == NAME
    report = api.follow_job(job["id"], poll_seconds=0.05)
    assert report["k"] == 3 and report == api.job_report(job["id"])
    assert [j["id"] for j in api.jobs(segmentation=NAME)] == [job["id"]]
    assert api.job(job["id"])["state"] == "done" and api.jobs(segmentation="other") == []
    with pytest.raises(Conflict) as finished:
        api.cancel_job(job["id"])
    assert "done" in str(finished.value.detail)
    with pytest.raises(NotFound):
        api.job("0" * 32)


def test_a_refused_background_fit_raises_at_once_and_makes_no_job(api, wine_frame):
    with pytest.raises(InvalidInput) as refused:
        api.fit(NAME, wine_frame, k=500, background=True)
    assert refused.value.status == 422 and api.jobs() == []


def test_a_cancelled_job_raises_job_failed(api, wine_frame):
    store = api._http.app.state.store
    original = store.save_version

    def cancel_first(name, bundle, **kwargs):
        api.cancel_job(kwargs["job_id"])             # the cancel arrives during 'saving'
        return original(name, bundle, **kwargs)

    store.save_version = cancel_first
    with pytest.raises(JobFailed) as stopped:
        api.fit(NAME, wine_frame, k=3, background=True)
    assert stopped.value.state == "cancelled" and stopped.value.job["version"] is None
    assert api.segmentations() == []
