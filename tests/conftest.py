"""Shared fixtures. Reference data sets ship with scikit-learn (no download). Also how the suite is shared
out between xdist workers (the hooks at the end)."""

from __future__ import annotations

import os
import shutil
from contextlib import contextmanager

# One BLAS/OpenMP thread per test process: `make test` runs two xdist workers on a 2-core machine, and a pool
# of two threads in each would fight over the cores (more CPU time, no shorter run). Set before numpy and
# scikit-learn load their libraries (the pools read these once); threadpoolctl below covers a library that
# was loaded earlier anyway. Server processes started by tests inherit the variables.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from fastapi.testclient import TestClient  # noqa: E402
from sklearn.datasets import load_iris, load_wine  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

from service.app import create_app  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store import FilesystemStore  # noqa: E402

threadpool_limits(limits=1)


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


JOB_WAIT_SECONDS = 180      # an upper bound for one job on a busy machine, not a measured time


def until_finished(client, job: str, seconds: float = JOB_WAIT_SECONDS) -> dict:
    """Poll a job (its id or its URL, through an HTTP test client) until it leaves queued and running; the
    finished job, or AssertionError naming the job and its last state after ``seconds``."""
    import time

    url = job if job.startswith("/") else f"/v1/jobs/{job}"
    deadline = time.monotonic() + seconds
    while True:
        state = client.get(url).json()
        if state["state"] not in ("queued", "running"):
            return state
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for job {url} to finish (last state {state['state']})")
        time.sleep(0.05)


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


# ------------------------------------------------------------------ store backends (local and postgres)
# The postgres tests use the server named by SEGSCORE_TEST_DATABASE_URL (`.ci/run` and `make test` set it to
# postgresql://postgres@127.0.0.1:5432/test). Each test gets a schema of its own, dropped afterwards. Without
# the variable they skip, except under CI=true, where a missing or unreachable server fails them.
TEST_DATABASE_VARIABLE = "SEGSCORE_TEST_DATABASE_URL"


def reachable_test_database_url() -> str:
    import os

    import psycopg

    url = os.environ.get(TEST_DATABASE_VARIABLE)
    in_ci = os.environ.get("CI") == "true"
    if not url:
        if in_ci:
            pytest.fail(f"CI=true: {TEST_DATABASE_VARIABLE} must name the PostgreSQL server of the store tests")
        pytest.skip(f"set {TEST_DATABASE_VARIABLE} to run the postgres store tests")
    try:
        psycopg.connect(url, connect_timeout=5).close()
    except psycopg.Error as exc:
        if in_ci:
            pytest.fail(f"CI=true: PostgreSQL at {TEST_DATABASE_VARIABLE} is unreachable: {type(exc).__name__}")
        pytest.skip(f"PostgreSQL at {TEST_DATABASE_VARIABLE} is unreachable")
    return url


def with_search_path(url: str, schema: str) -> str:
    """``url`` whose connections use ``schema`` (libpq's ``options`` parameter)."""
    from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

    parts = urlsplit(url)
    query = dict(parse_qsl(parts.query))
    query["options"] = f"-csearch_path={schema}"
    return urlunsplit(parts._replace(query=urlencode(query)))


@contextmanager
def fresh_schema_url():
    """A postgresql:// URL whose connections live in a fresh schema, dropped on exit."""
    import uuid

    import psycopg

    url = reachable_test_database_url()
    schema = f"segscore_test_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(url, autocommit=True) as connection:
        connection.execute(f'CREATE SCHEMA "{schema}"')
    try:
        yield with_search_path(url, schema)
    finally:
        with psycopg.connect(url, autocommit=True) as connection:
            connection.execute(f'DROP SCHEMA "{schema}" CASCADE')


@pytest.fixture
def postgres_url():
    with fresh_schema_url() as url:
        yield url


@pytest.fixture(params=["local", "postgres"])
def store_settings(request, tmp_path):
    """Settings of a fresh store on each backend (the same store tests run on both)."""
    if request.param == "postgres":
        url = request.getfixturevalue("postgres_url")
        return Settings(store_backend="postgres", database_url=url, store_dir=tmp_path / "artifacts")
    return Settings(store_dir=tmp_path / "store")


# ------------------------------------------------------------------ sharing the suite out between xdist workers
# Measured with `--durations=0` (CI=true, PostgreSQL and Chromium on; two workers): a handful of modules that
# drive real server processes take most of the time. xdist's default (`load`) hands out single tests, so a
# module's fixtures are built again on each worker and the long tests may land together at the end. Instead
# (pytest_xdist_make_scheduler below): one module is one unit of work (its module-scoped fixtures are built
# once), except in SPLIT_MODULES, whose tests are long and independent and go out one at a time; and the
# units are queued longest first (SLOW_FIRST: module paths or test ids, in the order of their times in such
# a run; the rest follow in collection order), so that the last units to start are short ones and the two
# workers finish together.
SPLIT_MODULES = (
    "tests/core/test_calibration.py",
    "tests/test_jobs_processes.py",
    "tests/test_replica_faults.py",
    "tests/test_shutdown.py",
)
SLOW_FIRST = (
    "tests/test_cli_client.py",
    "tests/test_workers.py",
    "tests/engines/test_dask_engine.py",
    "tests/store/test_filesystem.py",
    "tests/core/test_calibration.py::test_every_p_value_is_calibrated_under_the_null[10000]",
    "tests/test_replica_faults.py::test_a_database_outage_with_assigns_running_on_both_replicas",
    "tests/core/test_drift.py",
    "tests/test_replicas.py",
    "tests/test_jobs_processes.py::test_a_server_killed_with_a_running_job_is_followed_by_one_that_marks_it_failed",
    "tests/test_jobs_processes.py::test_fit_follows_its_job_and_jobs_lists_it_end_to_end",
    "tests/api/test_segmentations.py",
    "tests/test_shutdown.py::test_sigterm_finishes_requests_in_flight_and_exits_zero[2]",
    "tests/api/test_jobs.py",
    "tests/test_jobs_processes.py::test_a_job_on_one_postgres_replica_is_seen_and_cancelled_through_another",
    "tests/test_replica_faults.py::test_a_replica_killed_mid_fit_leaves_the_other_serving_and_the_store_consistent",
    "tests/api/test_fit.py",
    "tests/store/test_faults.py",
    "tests/core/test_calibration.py::test_every_p_value_is_calibrated_under_the_null[1000]",
    "tests/api/test_auth.py",
    "tests/test_shutdown.py::test_sigterm_finishes_requests_in_flight_and_exits_zero[1]",
    "tests/client/test_client.py",
    "tests/api/test_assign.py",
    "tests/api/test_drift.py",
    "tests/api/test_compare.py",
    "tests/test_connections.py",
)


def unit_of(nodeid: str) -> str:
    """The unit of work a test belongs to: its module, or the test itself in SPLIT_MODULES."""
    module = nodeid.split("::", 1)[0]
    return nodeid if module in SPLIT_MODULES else module


def pytest_xdist_make_scheduler(config, log):
    """`-n 2` alone means xdist's `load` (single tests); ours hands out the units of ``unit_of`` instead, in
    the order of the collection (sorted below), not xdist's most-tests-first."""
    if config.getvalue("dist") != "load":
        return None                      # another --dist asked for explicitly: xdist's own
    from xdist.scheduler import LoadScopeScheduling

    class UnitScheduling(LoadScopeScheduling):
        def _split_scope(self, nodeid: str) -> str:
            return unit_of(nodeid)

    config.option.loadscopereorder = False
    return UnitScheduling(config, log)


def _slow_rank(nodeid: str) -> int:
    for rank, prefix in enumerate(SLOW_FIRST):
        if nodeid == prefix or nodeid.startswith((prefix + "::", prefix + "[")):
            return rank
    return len(SLOW_FIRST)


def pytest_collection_modifyitems(config, items):
    for item in items:
        # schemathesis names each generated test after its operation (``item.name``) but leaves its node id
        # without it; xdist tells tests apart by node id, so 22 operations would run as one.
        if getattr(item, "operation_label", None) and "[" not in item.nodeid:
            _set_nodeid(item, f"{item.nodeid.split('::', 1)[0]}::{item.name}")
    seen: set[str] = set()
    duplicates = {item.nodeid for item in items if item.nodeid in seen or seen.add(item.nodeid)}
    if duplicates:
        raise pytest.UsageError(f"tests with the same id would run as one under xdist: {sorted(duplicates)}")
    # Stable: within a rank the collection order (so a module's tests stay in their written order).
    items.sort(key=lambda item: _slow_rank(item.nodeid))


def _set_nodeid(item, nodeid: str) -> None:
    if hasattr(item, "_id"):             # pytest 9: a structured id
        item._id = type(item._id).parse(nodeid)
    else:
        item._nodeid = nodeid
