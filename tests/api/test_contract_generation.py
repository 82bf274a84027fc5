"""The contract is generated from the routes: every route documented, every worked example
answered, every header sent declared on the response that sends it, and the /docs assets."""

from pathlib import Path

import pytest

from service.api import examples as ex
from service.api.contract import HEADERS
from service.api.csv_input import OPTIONS
from service.api.openapi import build_spec, documented_routes, routes_app, swagger_ui_dist

#: Routes that are not API operations: the contract itself and its page.
UNDOCUMENTED = {"/openapi.json", "/docs", "/docs/page.js", "/docs/page.css",
                "/docs/assets/<name>", "/static/<path:filename>"}


@pytest.fixture(scope="module")
def spec(app):
    return build_spec(10_000, "test", app)


def _declared(spec, path, method, status="200"):
    return set(spec["paths"][path][method]["responses"][status].get("headers", {}))


def _sent(response):
    return {name for name in response.headers.keys()
            if name.startswith("X-") or name in ("Retry-After", "WWW-Authenticate")}


def test_every_route_is_documented_or_known_not_to_be(app):
    documented = {rule.rule for rule in app.url_map.iter_rules()
                  if getattr(app.view_functions[rule.endpoint], "__contract__", None)}
    every = {rule.rule for rule in app.url_map.iter_rules()}
    assert every - documented == UNDOCUMENTED


def test_paths_are_the_documented_routes_with_unique_operation_ids(spec, app):
    routes = {(path, method) for path, method, _ in documented_routes(app)}
    assert {(p, m) for p, ops in spec["paths"].items() for m in ops} == routes
    ids = [op["operationId"] for ops in spec["paths"].values() for op in ops.values()]
    assert len(ids) == len(set(ids)) == len(routes)


def test_the_committed_contract_needs_no_loaded_bases(spec):
    # The CLI builds from the routes alone; the running app must give the same paths.
    assert build_spec(10_000, "test", routes_app())["paths"] == spec["paths"]


def test_openapi_module_writes_no_operation_by_hand():
    source = (Path(__file__).resolve().parents[2] / "service" / "api" / "openapi.py").read_text()
    assert '"/v1' not in source and "operationId\": \"" not in source


def test_csv_options_are_the_request_fields_and_never_required(spec):
    for path, extra in (("/v1/annuity-factors", set()), ("/v1/insurance-factors", set()),
                        ("/v1/cash-flow-projections", {"buckets"})):
        params = spec["paths"][path]["post"]["parameters"]
        assert {p["name"] for p in params} == (set(OPTIONS) - {"buckets"}) | extra
        assert all(p["in"] == "query" and not p["required"] and "example" not in p
                   and "default" not in p["schema"] for p in params)
    # The option is the JSON field: the same bounds.
    rate = next(p for p in spec["paths"]["/v1/annuity-factors"]["post"]["parameters"]
                if p["name"] == "interest_rate")
    body = spec["components"]["schemas"]["FactorRequest"]["properties"]["interest_rate"]
    assert (rate["schema"]["minimum"], rate["schema"]["maximum"]) == (
        body["minimum"], body["maximum"])


def test_every_operation_has_a_worked_example(spec):
    for op in (op for ops in spec["paths"].values() for op in ops.values()):
        if "requestBody" in op:
            content = op["requestBody"]["content"]
            assert content["application/json"]["examples"], op["operationId"]
            if "text/csv" in content:
                assert content["text/csv"]["example"], op["operationId"]
        for param in op.get("parameters", ()):
            if param["in"] == "path":
                assert "example" in param, (op["operationId"], param["name"])


@pytest.mark.parametrize("path,examples", [
    ("/v1/annuity-factors", ex.ANNUITY_FACTORS), ("/v1/insurance-factors", ex.INSURANCE_FACTORS),
    ("/v1/cash-flow-projections", ex.CASH_FLOW_PROJECTIONS),
    ("/v1/cash-flow-schedules", ex.CASH_FLOW_SCHEDULES)])
def test_json_examples_are_answered_and_their_headers_declared(client, spec, path, examples):
    for example in examples.values():
        response = client.post(path, json=example["value"])
        assert response.status_code == 200, response.get_json()
        assert _sent(response) == {"X-Request-ID"} <= _declared(spec, path, "post")
        csv = client.post(path, json=example["value"], headers={"Accept": "text/csv"})
        assert csv.status_code == 200 and csv.mimetype == "text/csv"
        assert _sent(csv) <= _declared(spec, path, "post"), _sent(csv) - _declared(
            spec, path, "post")


@pytest.mark.parametrize("path,body,basis", [
    ("/v1/annuity-factors", ex.CSV_ANNUITIES, "fernhollow-annuitants"),
    ("/v1/insurance-factors", ex.CSV_INSURANCE, "standard-ultimate"),
    ("/v1/cash-flow-projections", ex.CSV_PROJECTIONS, "fernhollow-annuitants")])
def test_csv_examples_are_answered_and_their_headers_declared(client, spec, path, body, basis):
    response = client.post(f"{path}?basis={basis}", data=body, content_type="text/csv",
                           headers={"Accept": "text/csv"})
    assert response.status_code == 200, response.get_data(as_text=True)
    sent = _sent(response)
    assert "X-Basis-Id" in sent and sent <= _declared(spec, path, "post")


def test_life_table_and_basis_examples_are_answered_with_declared_headers(client, spec):
    ref = ex.LIFE_TABLE["ref"]
    query = "&".join(f"{k}={v}" for k, v in ex.LIFE_TABLE.items() if k != "ref")
    path = "/v1/bases/{ref}/life-table"
    response = client.get(f"/v1/bases/{ref}/life-table?{query}", headers={"Accept": "text/csv"})
    assert response.status_code == 200
    assert {"X-Radix", "X-Radix-Age"} <= _sent(response) <= _declared(spec, path, "get")
    assert client.get(f"/v1/bases/{ex.BASIS_REF['ref']}").status_code == 200


def test_every_header_named_in_the_catalogue_is_declared_somewhere(spec):
    declared = {name for ops in spec["paths"].values() for op in ops.values()
                for reply in op["responses"].values() for name in reply.get("headers", {})}
    assert declared == set(HEADERS)


def test_x_request_id_is_required_on_every_response(spec):
    for ops in spec["paths"].values():
        for op in ops.values():
            for reply in op["responses"].values():
                assert reply["headers"]["X-Request-ID"]["required"] is True


def test_problems_declare_their_headers(spec):
    post = spec["paths"]["/v1/annuity-factors"]["post"]["responses"]
    assert "Retry-After" in post["503"]["headers"]
    assert "WWW-Authenticate" in post["401"]["headers"]


class TestDocsAssets:
    def test_the_page_has_its_own_csp_and_the_api_none(self, client):
        page = client.get("/docs")
        csp = page.headers["Content-Security-Policy"]
        assert "script-src 'self'" in csp and "connect-src 'self'" in csp
        assert "unsafe-eval" not in csp and "script-src 'self' 'unsafe-inline'" not in csp
        assert "Content-Security-Policy" not in client.get("/livez").headers

    def test_the_page_loads_swagger_ui_from_the_service(self, client):
        page = client.get("/docs").get_data(as_text=True)
        assert '<script src="/docs/assets/swagger-ui-bundle.js">' in page
        assert "<script>" not in page  # no inline script: the CSP forbids it
        assert 'url: "/openapi.json"' in client.get("/docs/page.js").get_data(as_text=True)

    @pytest.mark.parametrize("name", ["swagger-ui-bundle.js", "swagger-ui.css"])
    def test_assets_are_the_package_files(self, client, name):
        response = client.get(f"/docs/assets/{name}")
        try:
            assert response.status_code == 200
            assert response.get_data() == (swagger_ui_dist() / name).read_bytes()
            assert response.headers["Content-Security-Policy"]
        finally:
            response.close()

    @pytest.mark.parametrize("name", ["index.html", "..%2Fflask_swagger_ui.py", "nothing.js"])
    def test_other_names_are_404_problems(self, client, name):
        response = client.get(f"/docs/assets/{name}")
        assert response.status_code == 404
        assert response.mimetype == "application/problem+json"

    def test_the_shipped_swagger_ui_reads_openapi_3_1(self):
        # Swagger UI renders OpenAPI 3.1 from its major version 5 on (its release notes).
        version = (swagger_ui_dist() / "VERSION").read_text().strip().lstrip("v")
        assert int(version.split(".")[0]) >= 5
