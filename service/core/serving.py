"""What the server keeps of a fitted version: the bundle without its scikit-learn objects, and the compiled arrays.

``ServingBundle`` has every field of ``Bundle`` except the fitted scikit-learn steps (``FITTED_STEPS``); it is
derived from ``Bundle``'s own field list, so a field added to ``Bundle`` reaches the serving artifact without
a second edit. The scikit-learn objects stay available to analysts in a separate file that the server never
reads (see ``service.store.filesystem``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from service.core.assign import CompiledBundle, compile_bundle
from service.core.bundle import Bundle

# Bundle fields that hold fitted scikit-learn objects: kept out of everything the server loads.
FITTED_STEPS = ("imputer", "scaler", "pca", "clusterer")

ServingBundle = dataclasses.make_dataclass(
    "ServingBundle",
    [(f.name, f.type) for f in dataclasses.fields(Bundle) if f.name not in FITTED_STEPS],
    frozen=True,
    namespace={
        "__doc__": "A Bundle without its fitted scikit-learn steps (the fields of Bundle minus FITTED_STEPS).",
        "k": property(lambda self: int(self.centroids.shape[0])),
    },
)
ServingBundle.__module__ = __name__


@dataclass(frozen=True)
class ServingVersion:
    """Everything the server loads for one version (the root of the serving artifact)."""

    bundle: ServingBundle
    compiled: CompiledBundle


def serving_version(bundle: Bundle) -> ServingVersion:
    """The serving view of a freshly fitted bundle: scikit-learn objects dropped, the hot path compiled."""
    kept = {f.name: getattr(bundle, f.name) for f in dataclasses.fields(ServingBundle)}
    return ServingVersion(ServingBundle(**kept), compile_bundle(bundle))
