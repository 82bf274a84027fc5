"""Liveness, readiness, the committed OpenAPI contract and the /docs page."""

import json
from pathlib import Path

import pytest

from service import create_app
from service.api.openapi import spec_json

OPENAPI_FILE = Path(__file__).resolve().parents[2] / "openapi" / "openapi.json"
#: The batch limit of the default configuration, which the committed contract documents.
DEFAULT_MAX_ITEMS = 10_000


def test_livez(client):
    response = client.get("/livez")
    assert response.status_code == 200
    assert response.get_json()["status"] == "ok"


def test_readyz_on_the_shipped_tables(client, registry):
    response = client.get("/readyz")
    assert response.status_code == 200
    body = response.get_json()
    assert body["bases"] == len(registry.bases) > 0
    assert body["refused"] == [] and body["missing"] == []


def test_readyz_with_every_required_basis_present():
    app = create_app({"TESTING": True,
                      "REQUIRED_BASES": ("standard-ultimate", "fernhollow-annuitants@2025.1")})
    assert app.test_client().get("/readyz").status_code == 200


def test_readyz_503_when_a_required_basis_is_missing():
    app = create_app({"TESTING": True,
                      "REQUIRED_BASES": ("standard-ultimate", "fernhollow-annuitants@1999.1")})
    response = app.test_client().get("/readyz")
    assert response.status_code == 503
    body = response.get_json()
    assert body["missing"] == ["fernhollow-annuitants@1999.1"]
    assert body["status"] != "ready"


def test_readyz_503_when_a_required_basis_was_refused(tmp_path):
    (tmp_path / "broken.toml").write_text('id = "fernhollow-broken"\nversion = 2026.1.1\n')
    app = create_app({"TESTING": True, "TABLES_DIR": str(tmp_path),
                      "REQUIRED_BASES": ("fernhollow-broken",)})
    response = app.test_client().get("/readyz")
    assert response.status_code == 503
    body = response.get_json()
    assert body["missing"] == ["fernhollow-broken"]
    assert any("broken.toml" in line for line in body["refused"])


def test_readyz_503_with_no_basis_at_all(tmp_path):
    app = create_app({"TESTING": True, "TABLES_DIR": str(tmp_path), "REQUIRED_BASES": ()})
    assert app.test_client().get("/readyz").status_code == 503


def test_committed_contract_is_the_generated_one():
    # Fails when the schemas change and openapi/openapi.json was not regenerated.
    assert OPENAPI_FILE.read_text(encoding="utf-8") == spec_json(DEFAULT_MAX_ITEMS)


def test_served_contract_equals_the_committed_file_apart_from_version(client, app):
    assert app.config["MAX_ITEMS"] == DEFAULT_MAX_ITEMS
    response = client.get("/openapi.json")
    assert response.status_code == 200
    served = response.get_json()
    committed = json.loads(OPENAPI_FILE.read_text(encoding="utf-8"))
    assert served["info"].pop("version")
    committed["info"].pop("version")
    assert served == committed


def test_served_contract_documents_the_configured_batch_limit():
    app = create_app({"TESTING": True, "MAX_ITEMS": 7})
    served = app.test_client().get("/openapi.json").get_json()
    summary = served["paths"]["/v1/annuity-factors"]["post"]["summary"]
    assert "7 items" in summary


@pytest.mark.parametrize("phrase", [
    "qualified actuaries",
    "approved for its use under local regulation and professional standards",
    "Nothing this service returns is advice",
])
def test_docs_page_carries_the_caution(client, phrase):
    response = client.get("/docs")
    assert response.status_code == 200
    assert response.mimetype == "text/html"
    page = response.get_data(as_text=True)
    assert page.lstrip().lower().startswith("<!doctype html")
    caution = page[page.index('class="caution"'):]
    caution = caution[:caution.index("</p>")]
    assert phrase in caution


def test_docs_page_lists_every_operation(client):
    page = client.get("/docs").get_data(as_text=True)
    for path in ("/v1/bases", "/v1/bases/{ref}/life-table", "/v1/annuity-factors",
                 "/v1/cash-flow-schedules", "/readyz"):
        assert f"<code>{path}</code>" in page
