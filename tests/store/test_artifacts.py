"""The pickle-free serving artifact: generic round trip, refusals, planted pickles, legacy stores.

References: numpy's own ``np.load(..., allow_pickle=False)`` (refuses object arrays), ``pickle`` itself to
build the hostile payload, ``hashlib`` for digests. Round trips are compared field by field by walking
``dataclasses.fields`` so a field added to a serving class is covered without editing this file.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import math
import os
import pickle
import sqlite3
import zipfile
from pathlib import Path

import joblib
import numpy as np
import pytest
from click.testing import CliRunner

from service.cli import main as cli
from service.core.bundle import Bundle, FitConfig
from service.core.fit import fit_bundle
from service.core.serving import FITTED_STEPS, ServingBundle, serving_version
from service.errors import BundleCorrupt
from service.store import FilesystemStore, artifacts

CONFIGS = {
    "pca-kmeans": dict(k_min=3, k_max=3, k_fixed=True),
    "no-pca-minmax": dict(components=None, scaling="minmax", k_min=2, k_max=4),
    "robust-agglomerative": dict(scaling="robust", method="agglomerative", k_min=3, k_max=3, k_fixed=True),
    "all-components-none-scaling": dict(components=4, scaling="none", k_min=2, k_max=2, k_fixed=True),
}


@pytest.fixture(scope="module", params=sorted(CONFIGS))
def bundle(request, iris):
    return fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), **CONFIGS[request.param]))


# --------------------------------------------------------------------------- generic comparison
def assert_same(original, restored, where: str = "root") -> None:
    """Deep equality of two object trees: same types, arrays equal bit for bit with the same dtype and shape."""
    assert type(restored) is type(original), f"{where}: {type(restored).__name__} != {type(original).__name__}"
    if dataclasses.is_dataclass(original):
        for field in dataclasses.fields(original):
            assert_same(getattr(original, field.name), getattr(restored, field.name), f"{where}.{field.name}")
    elif isinstance(original, np.ndarray):
        assert (restored.dtype, restored.shape) == (original.dtype, original.shape), where
        np.testing.assert_array_equal(restored, original, err_msg=where)
    elif isinstance(original, (list, tuple)):
        assert len(restored) == len(original), where
        for i, (a, b) in enumerate(zip(original, restored)):
            assert_same(a, b, f"{where}[{i}]")
    elif isinstance(original, dict):
        assert list(restored) == list(original), where
        for key in original:
            assert_same(original[key], restored[key], f"{where}.{key}")
    elif isinstance(original, float) and math.isnan(original):
        assert math.isnan(restored), where
    else:
        assert restored == original, where


def test_serving_bundle_has_every_bundle_field_but_the_fitted_steps():
    assert {f.name for f in dataclasses.fields(ServingBundle)} == (
        {f.name for f in dataclasses.fields(Bundle)} - set(FITTED_STEPS))


def test_every_field_of_a_fitted_version_round_trips(bundle):
    view = serving_version(bundle)
    restored = artifacts.loads(artifacts.dumps(view))
    assert_same(view, restored)
    # The walk above covered every field of every serving dataclass reached from the version.
    seen = set()

    def classes(value):
        if dataclasses.is_dataclass(value):
            seen.add(type(value).__name__)
            for field in dataclasses.fields(value):
                classes(getattr(value, field.name))
    classes(view)
    assert seen == set(artifacts.SERVING_CLASSES)


def test_the_same_version_gives_the_same_bytes(bundle):
    assert artifacts.dumps(serving_version(bundle)) == artifacts.dumps(serving_version(bundle))


@dataclasses.dataclass(frozen=True)
class Everything:
    """One value of every kind the serializer supports (registered for these tests only)."""

    none: None
    flag: bool
    count: int
    big: int
    ratio: float
    nan: float
    inf: float
    minus_inf: float
    tiny: float
    text: str
    floats: np.ndarray
    ints: np.ndarray
    small_ints: np.ndarray
    bools: np.ndarray
    empty: np.ndarray
    zero_d: np.ndarray
    scalar: np.float32
    int_scalar: np.int64
    arrays: list
    ragged: tuple
    mixed: list
    nested: dict
    child: FitConfig


@pytest.fixture
def everything(monkeypatch):
    monkeypatch.setitem(artifacts.SERVING_CLASSES, "Everything", Everything)
    rng = np.random.default_rng(0)
    return Everything(
        none=None, flag=True, count=-3, big=2**62, ratio=0.1, nan=float("nan"), inf=float("inf"),
        minus_inf=float("-inf"), tiny=5e-324, text="ünïcode \"quoted\" $array",
        floats=rng.normal(size=(4, 3)) * 1e300, ints=np.arange(6, dtype=np.int64).reshape(2, 3),
        small_ints=np.array([1, 2], dtype=np.int32), bools=np.array([True, False]), empty=np.empty((0, 5)),
        zero_d=np.array(2.5), scalar=np.float32(1.5), int_scalar=np.int64(7),
        arrays=[np.array([1.0, 2.0]), np.array([3.0])], ragged=(np.array([1e-300]), 2, "x", None),
        mixed=[1, 2.5, "a", [True, None]], nested={"a": {"b": [1, {"$array": "not a tag"}]}, "": 0.0},
        child=FitConfig(features=["a", "b"], components=None),
    )


def test_every_supported_kind_of_value_round_trips(everything):
    assert_same(everything, artifacts.loads(artifacts.dumps(everything)))


@pytest.mark.parametrize("bad", [
    pytest.param(lambda b: dataclasses.replace(b, count=object()), id="object"),
    pytest.param(lambda b: dataclasses.replace(b, floats=np.array([{"a": 1}], dtype=object)), id="object-array"),
    pytest.param(lambda b: dataclasses.replace(b, nested={1: "int key"}), id="int-dict-key"),
    pytest.param(lambda b: dataclasses.replace(b, text=np.array(["s"])), id="string-array"),
])
def test_values_that_are_not_plain_data_are_refused_when_writing(everything, bad):
    with pytest.raises(artifacts.ArtifactError):
        artifacts.dumps(bad(everything))


def test_a_fitted_scikit_learn_object_cannot_enter_a_serving_artifact(bundle):
    with pytest.raises(artifacts.ArtifactError, match="not a registered serving class|not stored"):
        artifacts.dumps(bundle)


# --------------------------------------------------------------------------- hostile artifacts
class _PlantMarker:
    """Unpickling this calls Path.touch on the marker path: proof that a pickle was executed."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


def planted_pickle(marker: Path) -> bytes:
    return pickle.dumps(_PlantMarker(marker))


def test_the_planted_payload_does_run_when_unpickled(tmp_path):
    # The control: without it, "no marker" below could mean a payload that never works.
    marker = tmp_path / "control"
    pickle.loads(planted_pickle(marker))
    assert marker.exists()


def _npz_with_members(members: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    return buffer.getvalue()


def _object_array_npy(marker: Path) -> bytes:
    member = io.BytesIO()
    np.lib.format.write_array(member, np.array([_PlantMarker(marker)], dtype=object), allow_pickle=True)
    return member.getvalue()


@pytest.mark.parametrize("kind", ["raw-pickle", "joblib-file", "object-array-member", "pickle-as-manifest"])
def test_reading_never_unpickles(tmp_path, kind):
    marker = tmp_path / "marker"
    manifest = json.dumps({"format": artifacts.FORMAT, "root": {"$array": "a0"}}).encode()
    data = {
        "raw-pickle": lambda: planted_pickle(marker),
        "joblib-file": lambda: (joblib.dump(_PlantMarker(marker), tmp_path / "p.joblib"),
                                (tmp_path / "p.joblib").read_bytes())[1],
        "object-array-member": lambda: _npz_with_members({artifacts.MANIFEST: manifest,
                                                          "a0.npy": _object_array_npy(marker)}),
        "pickle-as-manifest": lambda: _npz_with_members({artifacts.MANIFEST: planted_pickle(marker)}),
    }[kind]()
    with pytest.raises(artifacts.ArtifactError):
        artifacts.loads(data)
    assert not marker.exists()


def test_a_manifest_cannot_name_a_class_outside_the_registry():
    manifest = json.dumps({"format": artifacts.FORMAT, "root": {
        "$dataclass": "PosixPath", "fields": {}}}).encode()
    with pytest.raises(artifacts.ArtifactError, match="unknown class"):
        artifacts.loads(_npz_with_members({artifacts.MANIFEST: manifest}))


# --------------------------------------------------------------------------- the store
def plant(store: FilesystemStore, name: str, version: int, data: bytes) -> None:
    """Replace a version's serving artifact and update its SHA-256 in the index (what an intruder with
    write access to the store directory can do)."""
    sha = hashlib.sha256(data).hexdigest()
    path = store.files.path(sha, ".npz")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    with sqlite3.connect(store.root / "index.sqlite3") as db:
        db.execute("UPDATE versions SET bundle_sha256=?, artifact=? WHERE name=? AND version=?",
                   (sha, f"{sha}.npz", name, version))


def test_a_planted_pickle_with_a_matching_sha256_is_refused_by_the_store(tmp_path, iris):
    bundle = fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=2, k_max=2, k_fixed=True))
    store = FilesystemStore(tmp_path / "store")
    store.save_version("shop", bundle, make_live=None)
    store.save_version("shop", bundle, make_live=None)
    marker = tmp_path / "marker"
    plant(store, "shop", 1, planted_pickle(marker))
    fresh = FilesystemStore(tmp_path / "store")
    with pytest.raises(BundleCorrupt, match="'shop' version 1 cannot be read"):
        fresh.load("shop", 1)
    assert fresh.load("shop", 2).bundle.k == 2
    assert not marker.exists()


# --------------------------------------------------------------------------- legacy stores
def make_legacy_version(store: FilesystemStore, name: str, bundle: Bundle) -> int:
    """Save ``bundle``, then put the version in the layout the store used before serving artifacts: the index
    row names ``vN.joblib`` (``joblib.dump(bundle, compress=3)``, as the old ``save_version`` wrote it) and
    records its SHA-256 (also in the stored report), and there is no ``.npz`` (nor any object)."""
    version = store.save_version(name, bundle, make_live=None)["version"]
    store.artifact_path(name, version).unlink()
    store.fitted_path(name, version).unlink()
    folder = store.root / "segmentations" / name
    legacy = folder / f"v{version:06d}.joblib"
    joblib.dump(bundle, legacy, compress=3)
    sha = hashlib.sha256(legacy.read_bytes()).hexdigest()
    with sqlite3.connect(store.root / "index.sqlite3") as db:
        report = json.loads(db.execute("SELECT report FROM versions WHERE name=? AND version=?",
                                       (name, version)).fetchone()[0])
        report["bundle_sha256"] = sha
        db.execute("UPDATE versions SET artifact=?, bundle_sha256=?, fitted_sha256=NULL, report=?"
                   " WHERE name=? AND version=?", (legacy.name, sha, json.dumps(report), name, version))
    return version


def test_a_legacy_store_is_named_until_upgraded_then_serves_the_same_results(tmp_path, iris):
    config = FitConfig(features=list(iris.feature_names), k_min=3, k_max=3, k_fixed=True)
    bundle = fit_bundle(iris.data, config)
    root = tmp_path / "store"
    make_legacy_version(FilesystemStore(root), "old", bundle)
    FilesystemStore(root).save_version("new", bundle, make_live=None)

    store = FilesystemStore(root)
    assert store.legacy_versions() == [("old", 1)]
    with pytest.raises(BundleCorrupt, match="'old' version 1 is in the legacy pickle format"):
        store.load("old", 1)
    assert store.load("new", 1).bundle.k == 3          # other versions are unaffected

    result = CliRunner().invoke(cli, ["upgrade-store", "--store", str(root)])
    assert result.exit_code == 0, result.output
    assert "converted 'old' version 1" in result.output

    upgraded = FilesystemStore(root)
    assert upgraded.legacy_versions() == []
    loaded = upgraded.load("old", 1)
    converted = upgraded.artifact_path("old", 1)
    assert converted.parent.parent == root / "objects"            # written as an object, as new versions are
    assert_same(serving_version(bundle), artifacts.loads(converted.read_bytes()))
    assert loaded.bundle.report == bundle.report
    # The report's bundle_sha256 names the new artifact; the old file stays as the analysts' copy.
    report = upgraded.version_report("old", 1)
    assert report["bundle_sha256"] == hashlib.sha256(converted.read_bytes()).hexdigest()
    assert upgraded.fitted_path("old", 1) == root / "segmentations" / "old" / "v000001.joblib"
    assert upgraded.fitted_path("old", 1).exists()
    # A second run has nothing left to do.
    assert "0 version(s) converted" in CliRunner().invoke(cli, ["upgrade-store", "--store", str(root)]).output


def test_upgrade_refuses_a_legacy_file_that_fails_its_sha256_without_unpickling_it(tmp_path, iris):
    bundle = fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=2, k_max=2, k_fixed=True))
    store = FilesystemStore(tmp_path / "store")
    make_legacy_version(store, "old", bundle)
    marker = tmp_path / "marker"
    (store.root / "segmentations" / "old" / "v000001.joblib").write_bytes(planted_pickle(marker))
    with pytest.raises(BundleCorrupt, match="SHA-256"):
        store.upgrade_legacy_versions()
    assert not marker.exists()
    assert os.path.exists(store.root / "index.sqlite3") and store.legacy_versions() == [("old", 1)]


def test_upgrade_names_a_version_fitted_before_held_out_calibration_and_leaves_it_legacy(tmp_path, iris):
    # A bundle pickled by an older release lacks fields the serving artifact needs (here the held-out outlier
    # count of the drift baseline): the upgrade must say which version and why, not crash, and convert the rest.
    bundle = fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=2, k_max=2, k_fixed=True))
    root = tmp_path / "store"
    make_legacy_version(FilesystemStore(root), "fresh", bundle)
    make_legacy_version(FilesystemStore(root), "old", bundle)
    object.__delattr__(bundle.reference, "outlier_count")        # what an older release's pickle looks like
    legacy = root / "segmentations" / "old" / "v000001.joblib"
    joblib.dump(bundle, legacy, compress=3)
    with sqlite3.connect(root / "index.sqlite3") as db:
        db.execute("UPDATE versions SET bundle_sha256=? WHERE name='old'",
                   (hashlib.sha256(legacy.read_bytes()).hexdigest(),))

    result = CliRunner().invoke(cli, ["upgrade-store", "--store", str(root)])
    assert result.exit_code == 1, result.output
    assert "converted 'fresh' version 1" in result.output
    assert "not converted: 'old' version 1" in result.output and "reference.outlier_count" in result.output
    store = FilesystemStore(root)
    assert store.legacy_versions() == [("old", 1)]
    with pytest.raises(BundleCorrupt, match="'old' version 1 is in the legacy pickle format"):
        store.load("old", 1)
    assert store.load("fresh", 1).bundle.k == 2


# --------------------------------------------------------------------------- stores older than objects
def make_pre_objects_store(root, name: str, bundles) -> None:
    """A store in the layout used before content-addressed objects: each version's ``vN.npz`` and ``vN.joblib``
    under ``segmentations/<name>/``, the index row naming ``vN.npz``, and no ``fitted_sha256`` column."""
    store = FilesystemStore(root)
    folder = root / "segmentations" / name
    for bundle in bundles:
        version = store.save_version(name, bundle, make_live=None)["version"]
        store.artifact_path(name, version).rename(folder / f"v{version:06d}.npz")
        store.fitted_path(name, version).rename(folder / f"v{version:06d}.joblib")
        with sqlite3.connect(root / "index.sqlite3") as db:
            db.execute("UPDATE versions SET artifact=? WHERE name=? AND version=?",
                       (f"v{version:06d}.npz", name, version))
    with sqlite3.connect(root / "index.sqlite3") as db:
        db.execute("ALTER TABLE versions DROP COLUMN fitted_sha256")
    assert not [p for p in (root / "objects").rglob("*") if p.is_file()]


def test_a_store_older_than_objects_is_read_in_place_and_grows_objects(tmp_path, iris):
    bundles = [fit_bundle(iris.data, FitConfig(features=list(iris.feature_names), k_min=k, k_max=k, k_fixed=True))
               for k in (2, 3)]
    root = tmp_path / "store"
    make_pre_objects_store(root, "old", bundles)

    store = FilesystemStore(root)            # adds the missing column; converts nothing
    folder = root / "segmentations" / "old"
    assert store.artifact_path("old", 1) == folder / "v000001.npz"
    assert store.fitted_path("old", 2) == folder / "v000002.joblib"
    assert store.load("old", 1).bundle.k == 2 and store.load("old", 2).bundle.k == 3
    # A tampered old file is still refused (its SHA-256 in the index).
    data = bytearray((folder / "v000001.npz").read_bytes())
    data[len(data) // 2] ^= 0x01
    (folder / "v000001.npz").write_bytes(bytes(data))
    with pytest.raises(BundleCorrupt):
        store.load("old", 1)

    # New versions go to objects; deleting an old version removes its files in place.
    report = store.save_version("old", bundles[0], make_live=None)
    assert store.artifact_path("old", 3).parent.parent == root / "objects"
    assert report["bundle_sha256"] == hashlib.sha256(store.artifact_path("old", 3).read_bytes()).hexdigest()
    store.delete_version("old", 2)
    assert sorted(p.name for p in folder.iterdir()) == ["v000001.joblib", "v000001.json", "v000001.npz",
                                                        "v000003.json"]
