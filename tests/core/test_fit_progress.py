"""The progress callback of ``fit_bundle`` and of a fit in a worker process (``fit_in_worker``), and a cancel
that stops the worker. Iris (scikit-learn's copy of Fisher's data) is the training data."""

from __future__ import annotations

import threading

import numpy as np
import pytest

from service.core.bundle import FitConfig
from service.core.fit import STEP_START, fit_bundle
from service.errors import FitCancelled
from service.fitting import fit_in_worker, running_fit_workers


def config(iris, k_min=2, k_max=5, **changes) -> FitConfig:
    return FitConfig(features=list(iris.feature_names), k_min=k_min, k_max=k_max, k_fixed=k_min == k_max, **changes)


def test_fit_bundle_reports_each_step_in_order_with_a_growing_fraction(iris):
    calls = []
    fit_bundle(iris.data, config(iris), progress=lambda step, fraction: calls.append((step, fraction)))
    assert [step for step, _ in calls] == ["scaling", "reducing", "clustering k=2", "clustering k=3",
                                           "clustering k=4", "clustering k=5", "profiling"]
    fractions = [fraction for _, fraction in calls]
    assert fractions == sorted(fractions) and len(set(fractions)) == len(fractions)
    assert fractions[0] == STEP_START["scaling"] and fractions[-1] == STEP_START["profiling"]
    assert all(0 < f < STEP_START["saving"] < 1 for f in fractions)


def test_the_callback_does_not_change_the_fit(iris):
    quiet = fit_bundle(iris.data, config(iris))
    followed = fit_bundle(iris.data, config(iris), progress=lambda step, fraction: None)
    assert followed.report == quiet.report
    np.testing.assert_array_equal(followed.centroids, quiet.centroids)


def test_a_worker_sends_its_steps_to_the_server(iris):
    calls = []
    bundle = fit_in_worker(iris.data, config(iris, 2, 3), max_agglomerative_rows=20_000, time_limit=300,
                           progress=lambda step, fraction: calls.append(step))
    assert calls == ["scaling", "reducing", "clustering k=2", "clustering k=3", "profiling"]
    assert bundle.report["data_sha256"] == fit_bundle(iris.data, config(iris, 2, 3)).report["data_sha256"]


def test_a_cancel_kills_the_worker_and_raises(iris):
    cancel = threading.Event()
    workers = []

    def on_progress(step, fraction):
        # The first message: the worker runs; cancel it from here (the server's cancel sets the same flag).
        if not workers:
            workers.extend(running_fit_workers())
            cancel.set()

    with pytest.raises(FitCancelled):
        fit_in_worker(iris.data, config(iris, 2, 10), max_agglomerative_rows=20_000, time_limit=300,
                      progress=on_progress, cancel=cancel)
    assert len(workers) == 1 and running_fit_workers() == []
