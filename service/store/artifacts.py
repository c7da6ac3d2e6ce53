"""The serving artifact: plain arrays and JSON, never a pickle.

A version's serving artifact is a ``.npz`` file (a zip of ``.npy`` arrays, written without pickles) plus one
member ``manifest.json`` that describes the object tree. The manifest is produced by walking dataclass fields,
so a field added to ``ReferenceProfile``, ``CompiledBundle`` or ``Bundle`` is written and read back with no
change here, as long as its value is made of:

    numpy arrays (numeric or bool dtypes), float, int, str, bool, None, lists and tuples of those,
    dicts with str keys, and dataclasses registered in ``SERVING_CLASSES``.

Anything else (a fitted scikit-learn object, an object array) is refused when writing. Reading uses
``np.load(..., allow_pickle=False)`` and rebuilds only the registered dataclasses by name: the manifest
cannot name a module or class to import, so a tampered file can at worst fail to load.

The zip is written with fixed timestamps, so the same object gives the same bytes (and SHA-256).
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
import zipfile
from typing import Any

import numpy as np

from service.core.assign import CompiledBundle
from service.core.bundle import FitConfig, ReferenceProfile
from service.core.serving import ServingBundle, ServingVersion

MANIFEST = "manifest.json"
FORMAT = "segscore-serving-1"
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)

# The only classes a manifest may name. Registered by bare class name; the registry is the allowlist.
SERVING_CLASSES: dict[str, type] = {cls.__name__: cls for cls in (
    ServingVersion, ServingBundle, CompiledBundle, ReferenceProfile, FitConfig)}


class ArtifactError(ValueError):
    """A serving artifact cannot be written or read (unsupported value, malformed file)."""


# --------------------------------------------------------------------------- writing
class _Encoder:
    def __init__(self) -> None:
        self.arrays: dict[str, np.ndarray] = {}

    def node(self, value: Any, where: str) -> Any:
        if value is None or isinstance(value, (bool, str)):
            return value
        if isinstance(value, (np.ndarray, np.generic)):
            # A numpy scalar (np.int64, np.float32, ...) is stored as a 0-d array and read back as a scalar.
            array = np.asarray(value)
            if array.dtype.kind not in "biuf":
                raise ArtifactError(f"{where}: arrays of dtype {array.dtype} are not stored")
            key = f"a{len(self.arrays)}"
            self.arrays[key] = array
            return {"$scalar" if isinstance(value, np.generic) else "$array": key}
        if isinstance(value, int):
            return value
        if isinstance(value, float):
            return value if math.isfinite(value) else {"$float": repr(value)}
        if isinstance(value, list):
            return [self.node(item, f"{where}[{i}]") for i, item in enumerate(value)]
        if isinstance(value, tuple):
            return {"$tuple": [self.node(item, f"{where}[{i}]") for i, item in enumerate(value)]}
        if isinstance(value, dict):
            if not all(isinstance(key, str) for key in value):
                raise ArtifactError(f"{where}: only dicts with str keys are stored")
            return {"$dict": {key: self.node(item, f"{where}.{key}") for key, item in value.items()}}
        if dataclasses.is_dataclass(value) and not isinstance(value, type):
            name = type(value).__name__
            if SERVING_CLASSES.get(name) is not type(value):
                raise ArtifactError(f"{where}: dataclass {name} is not a registered serving class")
            return {"$dataclass": name, "fields": {
                field.name: self.node(getattr(value, field.name), f"{where}.{field.name}")
                for field in dataclasses.fields(value)}}
        raise ArtifactError(f"{where}: values of type {type(value).__name__} are not stored")


def dumps(value: Any) -> bytes:
    """The artifact bytes of ``value`` (a registered dataclass). Deterministic."""
    encoder = _Encoder()
    tree = encoder.node(value, type(value).__name__)
    manifest = json.dumps({"format": FORMAT, "root": tree}, allow_nan=False).encode()
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr(zipfile.ZipInfo(MANIFEST, _ZIP_DATE), manifest, compress_type=zipfile.ZIP_DEFLATED)
        for key, array in encoder.arrays.items():
            member = io.BytesIO()
            np.lib.format.write_array(member, np.ascontiguousarray(array) if array.ndim else array,
                                      allow_pickle=False)
            archive.writestr(zipfile.ZipInfo(f"{key}.npy", _ZIP_DATE), member.getvalue(),
                             compress_type=zipfile.ZIP_DEFLATED)
    return buffer.getvalue()


# --------------------------------------------------------------------------- reading
def loads(data: bytes) -> Any:
    """Rebuild the object tree of ``dumps``. Raises ArtifactError on anything unexpected."""
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as archive:
            manifest = json.loads(bytes(archive[MANIFEST]).decode())
            if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
                raise ArtifactError("not a serving artifact of a known format")
            return _Decoder(archive).node(manifest.get("root"))
    except ArtifactError:
        raise
    except (ValueError, KeyError, TypeError, OSError, zipfile.BadZipFile, UnicodeDecodeError, RecursionError) as exc:
        raise ArtifactError(f"unreadable serving artifact ({type(exc).__name__})") from None


class _Decoder:
    def __init__(self, archive) -> None:
        self.archive = archive

    def node(self, node: Any) -> Any:
        if node is None or isinstance(node, (bool, int, float, str)):
            return node
        if isinstance(node, list):
            return [self.node(item) for item in node]
        if not isinstance(node, dict) or len(node) not in (1, 2):
            raise ArtifactError("malformed manifest node")
        if "$array" in node or "$scalar" in node:
            array = self.archive[str(node.get("$array", node.get("$scalar")))]
            if not isinstance(array, np.ndarray) or array.dtype.kind not in "biuf":
                raise ArtifactError("malformed array member")
            return array[()] if "$scalar" in node else array
        if "$float" in node:
            return float(node["$float"])
        if "$tuple" in node:
            return tuple(self.node(item) for item in node["$tuple"])
        if "$dict" in node:
            return {key: self.node(item) for key, item in node["$dict"].items()}
        if "$dataclass" in node:
            cls = SERVING_CLASSES.get(node["$dataclass"])
            if cls is None:
                raise ArtifactError(f"unknown class {node['$dataclass']!r} in the manifest")
            fields = {name: self.node(item) for name, item in node["fields"].items()}
            expected = {f.name for f in dataclasses.fields(cls) if f.init}
            if set(fields) != expected:
                raise ArtifactError(f"{cls.__name__}: fields {sorted(set(fields) ^ expected)} differ from the class")
            return cls(**fields)
        raise ArtifactError("malformed manifest node")
