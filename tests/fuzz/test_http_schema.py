"""Property-based fuzzing of the whole HTTP API from its own OpenAPI schema (schemathesis + hypothesis).

Every operation of ``/openapi.json`` gets ``EXAMPLES_PER_OPERATION`` generated requests (derandomized, so a
run is repeatable) against an app whose store holds a fitted segmentation named ``shop``; the generated
path names are mostly unknown ones, so a share of cases is pointed at ``shop`` to reach the real work.
The property: no 5xx, and every refusal (4xx) is JSON with a ``detail``.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import zlib
from pathlib import Path

import pyarrow as pa
import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

from service.app import create_app
from service.settings import Settings
from tests.conftest import records_from

EXAMPLES_PER_OPERATION = int(os.environ.get("SEGSCORE_FUZZ_EXAMPLES", "30"))
GENERATED: dict[str, int] = {}


# The schema is read from the app at collection time; the app's store is a temporary directory, removed
# after the module, and the segmentation is fitted before the first case.
IRIS_FEATURES = ["sepal length (cm)", "sepal width (cm)", "petal length (cm)", "petal width (cm)"]


def _arrow_stream(columns: dict[str, list]) -> bytes:
    table = pa.table({name: pa.array(values, type=pa.float64()) for name, values in columns.items()})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


# Arrow IPC stream bodies (assign, drift): raw bytes, or a stream of some of shop's features (missing values,
# NaN, infinities and huge numbers included), or such a stream cut short.
_VALUE = st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True), st.floats(-10, 10))
_ARROW_TABLE = st.integers(1, 60).flatmap(lambda n: st.dictionaries(
    st.sampled_from([*IRIS_FEATURES, "sepal length", "id"]), st.lists(_VALUE, min_size=n, max_size=n),
    min_size=1, max_size=5))
schemathesis.openapi.media_type("application/vnd.apache.arrow.stream", st.one_of(
    st.binary(max_size=2048),
    _ARROW_TABLE.map(_arrow_stream),
    st.tuples(_ARROW_TABLE.map(_arrow_stream), st.integers(1, 400)).map(lambda pair: pair[0][:-pair[1]]),
))

STORE = Path(tempfile.mkdtemp(prefix="segscore-fuzz-"))
# A small record limit keeps generated fits short; everything else is the default configuration.
APP = create_app(Settings(store_dir=STORE / "store", max_fit_rows=5_000))
schema = schemathesis.openapi.from_asgi("/openapi.json", APP)
# Parquet fit uploads: arbitrary bytes (an unreadable file must be a 4xx with a detail, never a 5xx).
schemathesis.openapi.media_type("application/vnd.apache.parquet", st.binary(max_size=512))


@pytest.fixture(scope="module", autouse=True)
def fitted_shop(iris):
    with TestClient(APP) as client:
        response = client.post("/v1/segmentations/shop/fit", json={"records": records_from(iris), "k": 3})
        assert response.status_code == 201, response.text
    yield
    shutil.rmtree(STORE, ignore_errors=True)


@schema.parametrize()
@settings(max_examples=EXAMPLES_PER_OPERATION, deadline=None, derandomize=True, database=None,
          suppress_health_check=list(HealthCheck))
def test_no_5xx_and_every_refusal_has_a_detail(case):
    if "name" in (case.path_parameters or {}) and zlib.crc32(repr(case.body).encode()) % 2 == 0:
        case.path_parameters["name"] = "shop"
    response = case.call()
    GENERATED[case.operation.label] = GENERATED.get(case.operation.label, 0) + 1
    assert response.status_code < 500, (case.method, case.formatted_path, response.status_code, response.text[:500])
    if 400 <= response.status_code < 500:
        assert "detail" in response.json(), response.text[:500]


def test_zz_report_the_number_of_generated_cases(capsys):
    # Printed for the README (run with -s); runs after the fuzz test in this module's order.
    with capsys.disabled():
        print(f"\nschema fuzz: {sum(GENERATED.values())} generated requests over {len(GENERATED)} operations")
