"""The contract document (docs/API.md) and the served API agree; /docs works without the internet."""

from __future__ import annotations

import re
from pathlib import Path

from schemas.common import ErrorResponse

API_MD = Path(__file__).resolve().parents[2] / "docs" / "API.md"
ROW = re.compile(r"^\| `(GET|POST|PUT|PATCH|DELETE) (/\S*)` \|", re.MULTILINE)
DOCUMENTED_ERRORS = {400, 401, 403, 404, 409, 413, 415, 422, 500, 503}


def _schema_operations(client) -> set[tuple[str, str]]:
    paths = client.get("/openapi.json").json()["paths"]
    return {(method.upper(), path) for path, operations in paths.items() for method in operations}


def test_every_openapi_operation_is_in_api_md_and_back(client):
    documented = set(ROW.findall(API_MD.read_text()))
    served = _schema_operations(client)
    assert served - documented == set(), "routes missing from docs/API.md"
    assert documented - served == set(), "docs/API.md lists routes the service does not serve"


def test_readme_links_to_the_contract_in_the_repository():
    readme = (API_MD.parents[1] / "README.md").read_text()
    assert "(docs/API.md)" in readme and "../shared" not in readme


def test_docs_page_loads_nothing_from_outside(client):
    # Issue 7 item 11: /docs was blank without internet (scripts from a CDN).
    page = client.get("/docs")
    assert page.status_code == 200
    assert re.findall(r"https?://", page.text) == []
    assets = re.findall(r'(?:src|href)="([^"]+)"', page.text)
    assert any(a.endswith(".js") for a in assets) and any(a.endswith(".css") for a in assets)
    for asset in assets:
        assert asset.startswith("/"), asset
        assert client.get(asset).status_code == 200, asset


def test_every_v1_operation_documents_its_errors_and_query_parameters(client):
    schema = client.get("/openapi.json").json()
    error_ref = f"#/components/schemas/{ErrorResponse.__name__}"
    for path, operations in schema["paths"].items():
        if not path.startswith("/v1/"):
            continue
        for method, operation in operations.items():
            statuses = {int(s) for s in operation["responses"] if s[0] in "45"}
            assert {401, 403, 422} <= statuses, (method, path)
            assert statuses <= DOCUMENTED_ERRORS, (method, path)
            for status in statuses:
                content = operation["responses"][str(status)]["content"]["application/json"]["schema"]
                assert content == {"$ref": error_ref}, (method, path, status)
            assert operation["security"] == [{"bearer": []}]
    fit_query = {p["name"] for p in schema["paths"]["/v1/segmentations/{name}/fit"]["post"]["parameters"]
                 if p["in"] == "query"}
    # The CSV form's parameters (issue 7 item 11: they were not declared, so "try it" could not send them).
    assert {"features", "id_column", "k", "components", "scaling", "method", "selection", "make_live"} <= fit_query
    for path in ("/v1/segmentations/{name}/assign", "/v1/segmentations/{name}/drift"):
        declared = {p["name"] for p in schema["paths"][path]["post"]["parameters"] if p["in"] == "query"}
        assert declared == {"version", "on_error"}
    assert "bearer" in schema["components"]["securitySchemes"]
