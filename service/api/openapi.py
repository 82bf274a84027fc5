"""The OpenAPI 3.1 contract, generated from the marshmallow schemas and the operations
recorded on the routes (service.api.contract), and the /docs page."""

import functools
import html
import importlib.util
import json
import re
from pathlib import Path

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin
from flask import Blueprint, Flask, Response, current_app, jsonify, send_from_directory

from service.api import contract
from service.api import schemas as s
from service.api.problems import ProblemError

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

#: /v1 operations take a bearer token when the operator configures tokens, none otherwise.
_AUTH = [{}, {"bearer": []}]


def _survivorship(converter, field, **kwargs):
    if isinstance(field, s.SurvivorshipField):
        return dict(s.SURVIVORSHIP_DOC)
    return {}


def _header(name: str) -> dict:
    entry = contract.HEADERS[name]
    return {"description": entry["description"],
            "schema": entry.get("schema", {"type": "string"}),
            **({"required": True} if name in contract.EVERY_RESPONSE else {})}


def _headers(names) -> dict:
    return {name: _header(name) for name in (*contract.EVERY_RESPONSE, *names)}


def _reply(reply: contract.Reply) -> dict:
    media = {"schema": reply.schema if reply.schema is not None else {"type": "string"}}
    if reply.example is not None:
        media["example"] = reply.example
    content = {reply.media: media}
    if reply.csv is not None:
        content["text/csv"] = {"schema": {"type": "string"}}
    return {"description": reply.description, "content": content,
            "headers": _headers((*reply.headers, *(reply.csv or ())))}


def _problem(code: int) -> dict:
    return {"description": contract.PROBLEMS[code],
            "content": {"application/problem+json": {"schema": s.ProblemSchema}},
            "headers": _headers(contract.PROBLEM_HEADERS.get(code, ()))}


def _operation(op: contract.Operation, max_items: int) -> dict:
    """The OpenAPI operation for a recorded one (schemas still as marshmallow classes:
    apispec's plugin expands and references them)."""
    out: dict = {"operationId": op.operation_id,
                 "summary": op.summary.format(max_items=max_items)}
    if op.description:
        out["description"] = op.description
    if op.auth:
        out["security"] = _AUTH
    parameters = [{"in": where, "schema": schema} for where, schema in (
        ("path", op.path), ("query", op.query),
        ("query", op.csv_body.options if op.csv_body else None)) if schema is not None]
    if parameters:
        out["parameters"] = parameters
    if op.body is not None:
        json_body = {"schema": op.body}
        if op.examples:
            json_body["examples"] = {name: dict(example)
                                     for name, example in op.examples.items()}
        content = {"application/json": json_body}
        body = {"required": True, "content": content}
        if op.csv_body is not None:
            content["text/csv"] = {"schema": {"type": "string"},
                                   "example": op.csv_body.example}
            body["description"] = op.csv_body.description
        out["requestBody"] = body
    out["responses"] = {str(code): _reply(reply) for code, reply in op.responses.items()}
    out["responses"] |= {str(code): _problem(code) for code in op.problems}
    return out


def _with_parameter_examples(operation: dict, examples: dict) -> None:
    """Set the examples of the expanded path and query parameters."""
    for parameter in operation.get("parameters", ()):
        if parameter["name"] in examples:
            parameter["example"] = examples[parameter["name"]]


_RULE_ARGUMENT = re.compile(r"<(?:[^<>:]+:)?([^<>]+)>")


def documented_routes(app: Flask):
    """(OpenAPI path, method, recorded operation) for every documented route of ``app``,
    from its url_map (HEAD and OPTIONS, which Flask adds, are not listed)."""
    for rule in app.url_map.iter_rules():
        op = contract.operation_of(app.view_functions[rule.endpoint])
        if op is None:
            continue
        path = _RULE_ARGUMENT.sub(r"{\1}", rule.rule)
        for method in sorted((rule.methods or set()) - {"HEAD", "OPTIONS"}):
            yield path, method.lower(), op


def routes_app() -> Flask:
    """An app holding the service's routes alone (no bases loaded): what the contract of the
    committed file is built from."""
    from service.api import route_blueprints

    app = Flask("service.api.routes")
    app.url_map.merge_slashes = False
    for blueprint in route_blueprints():
        app.register_blueprint(blueprint)
    return app


def build_spec(max_items: int, version: str = "", app: Flask | None = None) -> dict:
    """Return the OpenAPI document as a dict (deterministic for a given code version).

    Components come from the marshmallow schemas; paths from the operations recorded on the
    view functions of ``app`` (default: :func:`routes_app`), walked through its url_map."""
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
    by_path: dict[str, dict] = {}
    examples: dict[tuple[str, str], dict] = {}
    for path, method, op in documented_routes(app or routes_app()):
        by_path.setdefault(path, {})[method] = _operation(op, max_items)
        examples[path, method] = dict(op.parameter_examples)
    for path, operations in by_path.items():
        spec.path(path, operations=operations)
    document = spec.to_dict()
    for (path, method), given in examples.items():
        _with_parameter_examples(document["paths"][path][method], given)
    return document


def spec_json(max_items: int, version: str = "") -> str:
    return json.dumps(build_spec(max_items, version), indent=2, sort_keys=True) + "\n"


def _app_spec() -> dict:
    """The contract for this app's configuration and routes, built once per app."""
    if "openapi" not in current_app.extensions:
        current_app.extensions["openapi"] = build_spec(
            current_app.config["MAX_ITEMS"], current_app.config["SERVICE_VERSION"],
            current_app._get_current_object())
    return current_app.extensions["openapi"]


@bp.get("/openapi.json")
def openapi_json():
    """The contract."""
    return jsonify(_app_spec())


@functools.cache
def swagger_ui_dist() -> Path:
    """Swagger UI's own files, as the flask-swagger-ui package ships them (nothing is fetched
    from elsewhere, at build or at run time). Looked up on first use: building the contract
    (write-openapi) does not need them."""
    found = importlib.util.find_spec("flask_swagger_ui")
    if found is None or found.origin is None:
        raise RuntimeError("/docs needs the flask-swagger-ui package (make install)")
    return Path(found.origin).resolve().parent / "dist"


_SWAGGER_UI_FILES = ("swagger-ui.css", "swagger-ui-bundle.js", "favicon-32x32.png",
                     "favicon-16x16.png", "LICENSE", "VERSION")

#: The /docs page loads scripts and styles from this service only, and sends requests (Try
#: it out) to this service only; the page's own script is a file, so no inline script runs.
#: Styles allow 'unsafe-inline': Swagger UI sets style attributes in the markup it renders.
DOCS_CSP = ("default-src 'none'; script-src 'self'; style-src 'self' 'unsafe-inline'; "
            "img-src 'self' data:; connect-src 'self'; font-src 'self'; base-uri 'none'; "
            "form-action 'none'; frame-ancestors 'none'")
_DOCS_HEADERS = {"Content-Security-Policy": DOCS_CSP, "X-Content-Type-Options": "nosniff",
                 "Referrer-Policy": "no-referrer", "X-Frame-Options": "DENY"}

_DOCS_SCRIPT = """// Swagger UI on this service's contract (/openapi.json).
window.addEventListener("load", function () {
  window.ui = SwaggerUIBundle({
    url: "/openapi.json",
    dom_id: "#swagger-ui",
    deepLinking: true,
    presets: [SwaggerUIBundle.presets.apis],
    layout: "BaseLayout",
    validatorUrl: null,
    displayRequestDuration: true,
    defaultModelsExpandDepth: 0,
    tryItOutEnabled: false
  });
});
"""


def _operation_rows(spec: dict) -> str:
    """The operations as table rows (the page without scripts lists them)."""
    rows = []
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            rows.append(f"<tr><td><code>{method.upper()}</code></td><td><code>"
                        f"{html.escape(path)}</code></td><td>{html.escape(op['summary'])}</td>"
                        "</tr>")
    return "\n".join(rows)


def _docs_page(spec: dict) -> str:
    version = (swagger_ui_dist() / "VERSION").read_text(encoding="utf-8").strip()
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Annuity Factor Service</title>
<link rel="icon" type="image/png" href="/docs/assets/favicon-32x32.png">
<link rel="stylesheet" href="/docs/assets/swagger-ui.css">
<link rel="stylesheet" href="/docs/page.css">
</head>
<body>
<p class="caution" id="caution" role="note"><strong>Caution.</strong> {html.escape(CAUTION)}</p>
<p class="about">Try it out sends real requests to this service; the machine-readable
contract is at <a href="/openapi.json">/openapi.json</a>.</p>
<div id="swagger-ui"></div>
<noscript><table><tr><th>Method</th><th>Path</th><th>What it does</th></tr>
{_operation_rows(spec)}</table></noscript>
<footer>Swagger UI {html.escape(version)}, as shipped by the flask-swagger-ui package.</footer>
<script src="/docs/assets/swagger-ui-bundle.js"></script>
<script src="/docs/page.js"></script>
</body></html>
"""


_DOCS_STYLE = """body{margin:0;font-family:sans-serif}
.caution{border:2px solid #a60;background:#fff6e8;padding:.8rem 1rem;margin:1rem auto;
max-width:1420px;box-sizing:border-box}
.about,footer{max-width:1420px;margin:0 auto;padding:0 1rem;box-sizing:border-box}
footer{color:#666;font-size:.8rem;padding:1rem}
"""


def _docs_response(body, mimetype: str) -> Response:
    response = body if isinstance(body, Response) else Response(body, mimetype=mimetype)
    response.headers.update(_DOCS_HEADERS)
    return response


@bp.get("/docs")
def docs():
    """An interactive page of the contract: the caution, then Swagger UI."""
    return _docs_response(_docs_page(_app_spec()), "text/html")


@bp.get("/docs/page.js")
def docs_script():
    return _docs_response(_DOCS_SCRIPT, "text/javascript")


@bp.get("/docs/page.css")
def docs_style():
    return _docs_response(_DOCS_STYLE, "text/css")


@bp.get("/docs/assets/<name>")
def docs_asset(name: str):
    """Swagger UI's files, from the installed package (only the ones the page uses)."""
    if name not in _SWAGGER_UI_FILES:
        raise ProblemError(404, f"No such file: {name}.")
    response = send_from_directory(swagger_ui_dist(), name, max_age=3600)
    if name in ("LICENSE", "VERSION"):
        response.mimetype = "text/plain"
    return _docs_response(response, response.mimetype)
