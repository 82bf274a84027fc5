"""The OpenAPI 3.1 contract, generated from the marshmallow schemas, and the /docs page."""

import html
import json

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin
from flask import Blueprint, Response, current_app, jsonify

from service.api import schemas as s

bp = Blueprint("contract", __name__)

CAUTION = (
    "Results are for use by qualified actuaries. Every basis must be approved for its use "
    "under local regulation and professional standards before its factors are relied on. "
    "Nothing this service returns is advice."
)

DESCRIPTION = (
    "Present values of life-contingent payment streams (annuity factors) and the expected "
    "cash flows behind them, under named, versioned bases loaded and verified at start-up. "
    "Every factor is the present value of payments of 1 per annum; every response carries an "
    "audit block naming the basis id, version and content digest, the interest used and the "
    "method. Errors are RFC 9457 problem details (application/problem+json) with field paths. "
    + CAUTION
)

_ERRORS = {
    "400": "Malformed JSON, a body that is not UTF-8, duplicate keys, or NaN/Infinity literals.",
    "404": "No loaded basis answers to the reference.",
    "413": "Body or batch too large, or the batch needs more payment dates than one request "
           "may evaluate.",
    "415": "The body is not application/json (nor text/csv, where a batch may be CSV), or "
           "not UTF-8.",
    "406": "The Accept header allows neither application/json nor text/csv.",
    "422": "Well-formed but invalid or impossible input; `errors` maps field paths to messages.",
    "503": "The valuation was abandoned at its deadline (busy service or heavy request); "
           "retry later (Retry-After) or split the batch.",
    "401": "Bearer-token authentication is configured and no valid token was sent.",
}


CSV_DOC = (
    "JSON, or CSV (Content-Type: text/csv) with one item per row and the basis and options "
    "in the query string. CSV columns: id; the first life's age, sex, duration, "
    "age_adjustment, mortality_multiplier; a second life's age_2, sex_2, duration_2, "
    "age_adjustment_2, mortality_multiplier_2; the item's own fields by their JSON names "
    "(timing, frequency, term, term_months, deferral, guarantee, escalation, survivorship as "
    "a shortcut, start_requires; for insurance cover, benefit_timing, on); both, first_only, "
    "second_only for survivorship amounts. An empty cell is an absent field. Errors name the "
    "row (the file's line, the header being line 1) and column: rows.3.age.")
CSV_EXAMPLE = ("id,age,sex,timing,frequency,guarantee\n"
               "FM-20417,67,female,advance,12,5\nFM-20418,71.5,male,arrears,4,\n")


def _problem_responses(*codes):
    return {code: {"description": _ERRORS[code],
                   "content": {"application/problem+json": {
                       "schema": {"$ref": "#/components/schemas/Problem"}}}}
            for code in codes}


def _ok(schema: str, description: str, extra_content: dict | None = None):
    content = {"application/json": {"schema": {"$ref": f"#/components/schemas/{schema}"}}}
    if extra_content:
        content |= extra_content
    return {"200": {"description": description, "content": content,
                    "headers": {"X-Request-ID": {"schema": {"type": "string"},
                                                 "description": "The request id (echoed "
                                                                "when the caller sent one)."}}}}


#: /v1 operations take a bearer token when the operator configures tokens, none otherwise.
_AUTH = [{}, {"bearer": []}]


def _ref_param():
    return {"name": "ref", "in": "path", "required": True,
            "description": "ID (the default version) or ID@VERSION.",
            "schema": {"type": "string", "pattern": "^[^/]+$"}}


def _survivorship(converter, field, **kwargs):
    if isinstance(field, s.SurvivorshipField):
        return dict(s.SURVIVORSHIP_DOC)
    return {}


def build_spec(max_items: int, version: str = "") -> dict:
    """Return the OpenAPI document as a dict (deterministic for a given code version)."""
    plugin = MarshmallowPlugin(schema_name_resolver=lambda schema: None)
    spec = APISpec(title="Annuity Factor Service", version=version or "0.1.0",
                   openapi_version="3.1.0", plugins=[plugin],
                   info={"description": DESCRIPTION})
    plugin.converter.add_attribute_function(_survivorship)
    spec.components.security_scheme("bearer", {
        "type": "http", "scheme": "bearer",
        "description": "Required on /v1 routes only when the operator configures tokens "
                       "(ANNUITY_TOKEN_SHA256); off by default."})
    for name, schema in [
        ("Life", s.LifeSchema), ("SurvivorshipAmounts", s.SurvivorshipAmountsSchema),
        ("Item", s.ItemSchema), ("FactorRequest", s.FactorRequestSchema),
        ("ScheduleRequest", s.ScheduleRequestSchema), ("BasisRef", s.BasisRefSchema),
        ("Interest", s.InterestSchema), ("ServiceInfo", s.ServiceInfoSchema),
        ("Audit", s.AuditSchema), ("Method", s.MethodSchema),
        ("FactorResult", s.FactorResultSchema), ("FactorResponse", s.FactorResponseSchema),
        ("ScheduleRow", s.ScheduleRowSchema), ("ScheduleTotals", s.ScheduleTotalsSchema),
        ("ScheduleResponse", s.ScheduleResponseSchema), ("BasisSummary", s.BasisSummarySchema),
        ("BasisList", s.BasisListSchema), ("TableSource", s.TableSourceSchema),
        ("BasisDefaults", s.BasisDefaultsSchema), ("BasisDetail", s.BasisDetailSchema),
        ("LifeTableRow", s.LifeTableRowSchema), ("LifeTable", s.LifeTableSchema),
        ("Problem", s.ProblemSchema), ("Health", s.HealthSchema),
        ("InsuranceItem", s.InsuranceItemSchema), ("InsuranceRequest", s.InsuranceRequestSchema),
        ("InsuranceResult", s.InsuranceResultSchema),
        ("InsuranceResponse", s.InsuranceResponseSchema), ("KeyRate", s.KeyRateSchema),
        ("Warning", s.WarningSchema), ("ProjectionRequest", s.ProjectionRequestSchema),
        ("ProjectionResponse", s.ProjectionResponseSchema),
    ]:
        spec.components.schema(name, schema=schema)
    spec.path("/v1/bases", operations={"get": {
        "operationId": "listBases", "summary": "List the loaded bases.", "security": _AUTH,
        "responses": _ok("BasisList", "Every loaded basis version.")
        | _problem_responses("401")}})
    spec.path("/v1/bases/{ref}", parameters=[_ref_param()], operations={"get": {
        "operationId": "getBasis", "summary": "One basis in full.", "security": _AUTH,
        "responses": _ok("BasisDetail", "The basis.") | _problem_responses("401", "404")}})
    spec.path("/v1/bases/{ref}/life-table", parameters=[_ref_param()], operations={"get": {
        "operationId": "getLifeTable", "security": _AUTH,
        "summary": "The basis' table as rows (age, q, p, l, d, curtate expectation) for one "
                   "life followed from from_age; with duration, a life selected duration "
                   "years before from_age.",
        # One parameter per field of the query schema (apispec expands it).
        "parameters": [{"in": "query", "schema": s.LifeTableQuerySchema}],
        "responses": _ok("LifeTable", "The rows; as CSV with Accept: text/csv (the audit "
                                      "block then travels in X- headers).",
                         {"text/csv": {"schema": {"type": "string"}}})
        | _problem_responses("401", "404", "406", "422")}})
    csv_body = {"text/csv": {"schema": {"type": "string"}, "example": CSV_EXAMPLE}}
    csv_params = [
        {"name": "basis", "in": "query", "schema": {"type": "string"},
         "description": "With a CSV body: the basis ref (ID or ID@VERSION)."},
        {"name": "interest_rate", "in": "query", "schema": {"type": "number"},
         "description": "With a CSV body: a flat rate replacing the basis' interest."},
        {"name": "on_error", "in": "query", "schema": {"type": "string",
                                                       "enum": ["reject", "per-item"]},
         "description": "With a CSV body: as the JSON field."},
        {"name": "valuation_date", "in": "query", "schema": {"type": "string",
                                                             "format": "date"},
         "description": "With a CSV body: as the JSON field."}]
    spec.path("/v1/annuity-factors", operations={"post": {
        "operationId": "annuityFactors", "security": _AUTH,
        "summary": f"One or many annuity factors under one basis (at most {max_items} items).",
        "parameters": csv_params,
        "requestBody": {"required": True, "description": CSV_DOC, "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/FactorRequest"}},
            **csv_body}},
        "responses": _ok("FactorResponse", "results[i] answers items[i]. With Accept: text/csv "
                                           "one row per item (id, value, the measures and "
                                           "spread asked for, the method), the audit block in "
                                           "X- headers.",
                         {"text/csv": {"schema": {"type": "string"}}})
        | _problem_responses("400", "401", "404", "406", "413", "415", "422", "503")}})
    spec.path("/v1/insurance-factors", operations={"post": {
        "operationId": "insuranceFactors", "security": _AUTH,
        "summary": f"One or many insurance factors under one basis (at most {max_items} "
                   "items), each with its second moment.",
        "parameters": csv_params,
        "requestBody": {"required": True, "description": CSV_DOC, "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/InsuranceRequest"}},
            **csv_body}},
        "responses": _ok("InsuranceResponse", "results[i] answers items[i]; as CSV (one row "
                                              "per item) with Accept: text/csv.",
                         {"text/csv": {"schema": {"type": "string"}}})
        | _problem_responses("400", "401", "404", "406", "413", "415", "422", "503")}})
    spec.path("/v1/cash-flow-projections", operations={"post": {
        "operationId": "cashFlowProjections", "security": _AUTH,
        "summary": f"The expected payments of a portfolio of annuities (at most {max_items} "
                   "items, each with its annual amount), aggregated by month, year or payment "
                   "time, with their present values; as CSV with Accept: text/csv.",
        "parameters": [*csv_params, {
            "name": "buckets", "in": "query",
            "schema": {"type": "string", "enum": ["monthly", "annual", "exact"]},
            "description": "With a CSV body: as the JSON field."}],
        "requestBody": {"required": True, "description": CSV_DOC + " A CSV projection adds "
                                                                   "an amount column.",
                        "content": {"application/json": {"schema": {
                            "$ref": "#/components/schemas/ProjectionRequest"}}, **csv_body}},
        "responses": _ok("ProjectionResponse", "One row per period with a payment.",
                         {"text/csv": {"schema": {"type": "string"}}})
        | _problem_responses("400", "401", "404", "406", "413", "415", "422", "503")}})
    spec.path("/v1/cash-flow-schedules", operations={"post": {
        "operationId": "cashFlowSchedules", "security": _AUTH,
        "summary": "The expected payment schedule behind one factor, as JSON or as CSV "
                   "(Accept: text/csv; the audit block then travels in X- headers).",
        "requestBody": {"required": True, "content": {"application/json": {
            "schema": {"$ref": "#/components/schemas/ScheduleRequest"}}}},
        "responses": _ok("ScheduleResponse", "One row per possible payment date (one per year "
                                             "of the window for continuous payments).",
                         {"text/csv": {"schema": {"type": "string"}}})
        | _problem_responses("400", "401", "404", "406", "413", "415", "422")}})
    spec.path("/livez", operations={"get": {
        "operationId": "livez", "summary": "Liveness: the process answers.",
        "responses": _ok("Health", "Alive.")}})
    spec.path("/readyz", operations={"get": {
        "operationId": "readyz",
        "summary": "Readiness: 200 when every required basis is loaded and verified, else 503.",
        "responses": _ok("Health", "Ready.") | {"503": {
            "description": "Not ready: a required basis is missing or refused.",
            "content": {"application/json": {
                "schema": {"$ref": "#/components/schemas/Health"}}}}}}})
    spec.path("/metrics", operations={"get": {
        "operationId": "metrics",
        "summary": "Prometheus text format: requests and latency by route and status, "
                   "factors computed, one info series per loaded basis with its digest.",
        "responses": {"200": {"description": "The metrics.",
                              "content": {"text/plain": {"schema": {"type": "string"}}}}}}})
    return spec.to_dict()


def spec_json(max_items: int, version: str = "") -> str:
    return json.dumps(build_spec(max_items, version), indent=2, sort_keys=True) + "\n"


def _app_spec() -> dict:
    """The contract for this app's configuration, built once per app."""
    if "openapi" not in current_app.extensions:
        current_app.extensions["openapi"] = build_spec(current_app.config["MAX_ITEMS"],
                                                       current_app.config["SERVICE_VERSION"])
    return current_app.extensions["openapi"]


@bp.get("/openapi.json")
def openapi_json():
    """The contract."""
    return jsonify(_app_spec())


@bp.get("/docs")
def docs():
    """A browsable page of the contract."""
    spec = _app_spec()
    rows = []
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            if method == "parameters":
                continue
            rows.append(f"<tr><td><code>{method.upper()}</code></td><td><code>"
                        f"{html.escape(path)}</code></td><td>{html.escape(op['summary'])}</td>"
                        "</tr>")
    schemas = "".join(
        f"<details><summary><code>{html.escape(name)}</code></summary><pre>"
        f"{html.escape(json.dumps(body, indent=2))}</pre></details>"
        for name, body in spec["components"]["schemas"].items())
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>Annuity Factor Service</title>
<style>body{{font-family:sans-serif;max-width:60rem;margin:2rem auto;padding:0 1rem}}
td,th{{padding:.3rem .6rem;text-align:left;vertical-align:top}}
.caution{{border:2px solid #a60;padding:.8rem;background:#fff6e8}}</style></head>
<body><h1>Annuity Factor Service</h1>
<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>
<p>{html.escape(DESCRIPTION.replace(CAUTION, ''))}</p>
<p>The machine-readable contract is at <a href="/openapi.json">/openapi.json</a>.</p>
<h2>Operations</h2><table><tr><th>Method</th><th>Path</th><th>What it does</th></tr>
{''.join(rows)}</table>
<h2>Schemas</h2>{schemas}
</body></html>
"""
    return Response(page, mimetype="text/html")
