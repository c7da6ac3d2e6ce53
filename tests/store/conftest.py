"""Fixtures of the store tests."""

from __future__ import annotations

import pytest

from service.core.bundle import FitConfig
from service.core.fit import fit_bundle


@pytest.fixture(scope="module")
def bundles(iris):
    """Two small iris bundles (k = 2 and k = 3)."""
    def one(k):
        return fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=k, k_max=k, k_fixed=True))
    return one(2), one(3)
