"""Architecture guards: the numerical core stays free of web imports; every error maps to a status."""

from __future__ import annotations

import subprocess
import sys

import pytest

from service.app import STATUS_BY_ERROR, status_for
from service.errors import ServiceError


WEB_AND_STORE = ("fastapi", "starlette", "pydantic", "schemas", "service.store")


def forbidden_imports(imports: str, forbidden: tuple[str, ...]) -> list[str]:
    """Modules of ``forbidden`` that running ``imports`` loads, in a fresh interpreter."""
    code = f"import sys;{imports};print(','.join(m for m in {forbidden!r} if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return [m for m in out.stdout.strip().split(",") if m]


def test_core_imports_no_web_framework():
    imports = ("import service.core.fit, service.core.assign, service.core.frame, service.core.bundle;"
               "import importlib.util;"
               "drift = importlib.util.find_spec('service.core.drift');"
               "drift and __import__('service.core.drift')")
    assert forbidden_imports(imports, WEB_AND_STORE) == []


def test_charts_import_no_web_framework_and_no_store():
    # service.charts draws from plain data (report dicts, numpy arrays): no web layer, no store.
    assert forbidden_imports("import service.charts", (*WEB_AND_STORE, "service.api")) == []


def _all_subclasses(cls):
    for sub in cls.__subclasses__():
        yield sub
        yield from _all_subclasses(sub)


def test_every_service_error_has_an_http_status():
    for cls in _all_subclasses(ServiceError):
        assert any(base in STATUS_BY_ERROR for base in cls.__mro__), cls
    # The specific ones the contract names.
    from service.errors import BadBody, BundleCorrupt, InvalidRecords, MissingKey, NoLiveVersion, \
        PayloadTooLarge, ScopeDenied, SegmentationNotFound, StoreUnavailable
    assert status_for(BadBody()) == 400
    assert status_for(MissingKey()) == 401
    assert status_for(ScopeDenied("fit")) == 403
    assert status_for(SegmentationNotFound("x")) == 404
    assert status_for(NoLiveVersion("x")) == 409
    assert status_for(PayloadTooLarge()) == 413
    assert status_for(InvalidRecords([])) == 422
    assert status_for(BundleCorrupt("x", 1)) == 500
    assert status_for(StoreUnavailable()) == 503


@pytest.mark.parametrize(
    "module, forbidden",
    [("service.core.compare", ("fastapi", "starlette", "pydantic", "schemas", "service.store")),
     # The client talks HTTP only: no server, numerical or contract code comes with it.
     ("segscore.client", ("fastapi", "starlette", "sklearn", "service.app", "service.core", "schemas"))],
    ids=["core-compare", "client"],
)
def test_module_imports_nothing_above_it(module, forbidden):
    code = f"import sys, {module}; print(','.join(m for m in {forbidden!r} if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
