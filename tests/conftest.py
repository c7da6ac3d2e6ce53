"""Shared fixtures. Reference data sets ship with scikit-learn (no download)."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sklearn.datasets import load_iris, load_wine

from service.app import create_app
from service.settings import Settings
from service.store import FilesystemStore


@pytest.fixture(scope="session")
def iris():
    """Fisher's Iris (150 x 4) via sklearn.datasets.load_iris."""
    return load_iris()


@pytest.fixture(scope="session")
def wine():
    """UCI Wine (178 x 13) via sklearn.datasets.load_wine."""
    return load_wine()


def records_from(data, feature_names=None, id_prefix=None) -> list[dict]:
    """A scikit-learn Bunch or an array -> JSON records (plain floats)."""
    values = np.asarray(data) if isinstance(data, (np.ndarray, list)) else data.data
    names = feature_names or list(getattr(data, "feature_names", [f"f{j}" for j in range(values.shape[1])]))
    rows = [dict(zip(names, map(float, row))) for row in values]
    if id_prefix is not None:
        for i, row in enumerate(rows):
            row["id"] = f"{id_prefix}{i}"
    return rows


def walk_numbers(value):
    """Every float inside a decoded JSON document (to check that none is NaN or infinite)."""
    if isinstance(value, dict):
        for v in value.values():
            yield from walk_numbers(v)
    elif isinstance(value, list):
        for v in value:
            yield from walk_numbers(v)
    elif isinstance(value, float):
        yield value


@pytest.fixture
def settings(tmp_path) -> Settings:
    return Settings(store_dir=tmp_path / "store")


@pytest.fixture
def client(settings):
    with TestClient(create_app(settings)) as test_client:
        yield test_client


def create_keys(store_dir, scopes_by_name: dict[str, list[str]]) -> dict[str, str]:
    """The one way tests create API keys: in the store, as ``segscore keys create`` does. -> {name: key}."""
    store = FilesystemStore(store_dir)
    return {name: store.create_key(name, scopes) for name, scopes in scopes_by_name.items()}


@pytest.fixture
def keys(fitted_store, tmp_path) -> dict[str, str]:
    """The module's ``fitted_store`` copied to ``tmp_path / "store"`` with a 'fit' key and a 'read' key."""
    shutil.copytree(fitted_store, tmp_path / "store")
    return create_keys(tmp_path / "store", {"fit": ["fit"], "read": ["read"]})


@pytest.fixture
def secured(keys, tmp_path):
    """An app on that store (so with keys: authentication on)."""
    with TestClient(create_app(Settings(store_dir=tmp_path / "store"))) as client:
        yield client


def png_size(body: bytes) -> tuple[int, int]:
    """(width, height) of a PNG, decoded by Pillow (which raises on anything that is not a valid image)."""
    from PIL import Image
    import io

    with Image.open(io.BytesIO(body)) as image:
        assert image.format == "PNG"
        image.load()                 # decodes every pixel: a truncated or corrupt file fails here
        return image.size
