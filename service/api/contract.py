"""What each route promises, recorded on its view function: the source of the OpenAPI paths.

A route is documented by the :func:`operation` decorator, placed above the route decorator::

    @bp.post("/v1/annuity-factors")
    @operation("annuityFactors", "One or many annuity factors.", body=FactorRequestSchema,
               responses={200: Reply(FactorResponseSchema, "...", csv=AUDIT_CSV)},
               problems=(400, 422), auth=True)
    def annuity_factors(): ...

It records an :class:`Operation` on the function (``view.__contract__``) and changes nothing
else: the view runs as before. service.api.openapi walks the app's url_map and turns each
recorded operation into an OpenAPI operation, with apispec's MarshmallowPlugin expanding the
marshmallow schemas (query and path parameters, bodies, responses). Response headers are named
here once (:data:`HEADERS`) and listed on each reply that sends them.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from marshmallow import Schema

#: Every response header the service sends, with what it means.
HEADERS: dict[str, dict[str, Any]] = {
    "X-Request-ID": {"description": "The request id: the caller's X-Request-ID when it was "
                                    "well formed, else one the service made. The log line and "
                                    "the audit block carry the same id."},
    "X-Basis-Id": {"description": "CSV answers: the basis id (audit.basis.id)."},
    "X-Basis-Version": {"description": "CSV answers: the basis version."},
    "X-Basis-Digest": {"description": "CSV answers: the basis content digest (sha256)."},
    "X-Basis-Status": {"description": "CSV answers: approved, demo or retired.",
                       "schema": {"type": "string", "enum": ["approved", "demo", "retired"]}},
    "X-Valuation-Date": {"description": "CSV answers: the request's valuation date, where it "
                                        "gave one.", "schema": {"type": "string",
                                                                "format": "date"}},
    "X-Improvement": {"description": "CSV answers under an improved basis: the scale file, "
                                     "its projection and base year (and static year), as "
                                     "'data/scale.csv; projection=generational; "
                                     "base_year=2020'."},
    "X-Interest-Kind": {"description": "CSV answers: flat, spot, segments or forward."},
    "X-Interest-Rate": {"description": "CSV answers on a flat rate: the rate.",
                        "schema": {"type": "string", "pattern": r"^-?[0-9.eE+-]+$"}},
    "X-Interest-Structure": {"description": "CSV answers on a curve or bands: the structure as "
                                            "compact JSON, unless it is too long for a header "
                                            "(X-Interest-Digest then names it)."},
    "X-Interest-Digest": {"description": "CSV answers: sha256 over the canonical interest "
                                         "structure."},
    "X-Interest-Source": {"description": "CSV answers: basis or request.",
                          "schema": {"type": "string", "enum": ["basis", "request"]}},
    "X-Service": {"description": "CSV answers: the service name and version, name/version."},
    "X-Computed-At": {"description": "CSV answers: when the answer was computed (ISO 8601, "
                                     "UTC).", "schema": {"type": "string",
                                                         "format": "date-time"}},
    "X-Warnings": {"description": "CSV answers with warnings: the first five as 'path: "
                                  "message', joined by ' | ', and how many more (ask for JSON "
                                  "to see them)."},
    "X-Method-Evaluation": {"description": "CSV schedule: method.evaluation."},
    "X-Method-Fractional-Age": {"description": "CSV schedule: method.fractional_age."},
    "X-Method-Approximation": {"description": "CSV schedule: method.approximation."},
    "X-Total-Present-Value": {"description": "CSV schedule or projection: the total present "
                                             "value (times the amount).",
                              "schema": {"type": "string"}},
    "X-Factor": {"description": "CSV schedule: the factor (present value of 1 per annum)."},
    "X-Amount": {"description": "CSV schedule: the annual amount the rows are scaled by."},
    "X-Total-Payment": {"description": "CSV projection: the expected payments, undiscounted."},
    "X-Items-Valued": {"description": "CSV projection: items valued.",
                       "schema": {"type": "string", "pattern": "^[0-9]+$"}},
    "X-Items-Refused": {"description": "CSV projection: items refused (on_error 'per-item').",
                        "schema": {"type": "string", "pattern": "^[0-9]+$"}},
    "X-Radix": {"description": "CSV life table: l at X-Radix-Age."},
    "X-Radix-Age": {"description": "CSV life table: the age of the radix.",
                    "schema": {"type": "string", "pattern": "^[0-9]+$"}},
    "Retry-After": {"description": "Seconds to wait before trying again.",
                    "schema": {"type": "string", "pattern": "^[0-9]+$"}},
    "WWW-Authenticate": {"description": "The bearer scheme and realm."},
}

#: The audit block of a CSV answer, in headers (views._csv_response); conditional ones last.
AUDIT_CSV = ("X-Basis-Id", "X-Basis-Version", "X-Basis-Digest", "X-Basis-Status",
             "X-Interest-Kind", "X-Interest-Digest", "X-Interest-Source", "X-Service",
             "X-Computed-At", "X-Valuation-Date", "X-Improvement", "X-Interest-Rate",
             "X-Interest-Structure")
#: Sent on every response (service.api.observe).
EVERY_RESPONSE = ("X-Request-ID",)

#: What each problem status means, wherever it is listed.
PROBLEMS: dict[int, str] = {
    400: "Malformed JSON, a body that is not UTF-8, duplicate keys, or NaN/Infinity literals.",
    401: "Bearer-token authentication is configured and no valid token was sent.",
    404: "No loaded basis answers to the reference.",
    406: "The Accept header allows neither application/json nor text/csv.",
    413: "Body or batch too large, or the batch needs more payment dates than one request "
         "may evaluate.",
    415: "The body is not application/json (nor text/csv, where a batch may be CSV), or "
         "not UTF-8.",
    422: "Well-formed but invalid or impossible input; `errors` maps field paths to messages.",
    503: "The valuation was abandoned at its deadline (busy service or heavy request); "
         "retry later (Retry-After) or split the batch.",
}
#: Headers a problem of that status carries besides X-Request-ID (service.api.problems,
#: service.api.observe).
PROBLEM_HEADERS: dict[int, tuple[str, ...]] = {401: ("WWW-Authenticate",),
                                               503: ("Retry-After",)}


@dataclass(frozen=True)
class Reply:
    """One documented response: its JSON schema (or another media type), what it means, and,
    where the route also answers text/csv (Accept: text/csv), the headers that CSV carries."""

    schema: type[Schema] | None
    description: str
    #: Headers sent with the CSV form of this answer (None: no CSV form).
    csv: tuple[str, ...] | None = None
    #: Headers sent with every form of this answer, besides X-Request-ID.
    headers: tuple[str, ...] = ()
    #: The media type of ``schema`` (or, without a schema, of a plain-text answer).
    media: str = "application/json"
    example: Any = None


@dataclass(frozen=True)
class CsvBody:
    """A batch may also come as CSV, its options in the query string (``options``: the
    schema of those query parameters)."""

    description: str
    example: str
    options: type[Schema]


@dataclass(frozen=True)
class Operation:
    operation_id: str
    #: May hold ``{max_items}``, filled in with the configured batch limit.
    summary: str
    responses: Mapping[int, Reply]
    problems: tuple[int, ...] = ()
    query: type[Schema] | None = None
    path: type[Schema] | None = None
    body: type[Schema] | None = None
    csv_body: CsvBody | None = None
    auth: bool = False
    #: Named request examples: {name: {"summary": ..., "value": body}} (JSON bodies).
    examples: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    #: Examples of path and query parameters, by name.
    parameter_examples: Mapping[str, Any] = field(default_factory=dict)
    description: str | None = None


def operation(operation_id: str, summary: str, *, responses: Mapping[int, Reply],
              problems: Iterable[int] = (), query: type[Schema] | None = None,
              path: type[Schema] | None = None, body: type[Schema] | None = None,
              csv_body: CsvBody | None = None, auth: bool = False,
              examples: Mapping[str, Mapping[str, Any]] | None = None,
              parameter_examples: Mapping[str, Any] | None = None,
              description: str | None = None) -> Callable:
    """Record the operation on the view function; the function itself is unchanged."""
    unknown = {name for reply in responses.values()
               for name in (*(reply.csv or ()), *reply.headers) if name not in HEADERS}
    unknown |= {f"problem {code}" for code in problems if code not in PROBLEMS}
    if unknown:
        raise ValueError(f"{operation_id}: not in the catalogue: {sorted(unknown)}")
    op = Operation(operation_id, summary, dict(responses), tuple(problems), query, path, body,
                   csv_body, auth, dict(examples or {}), dict(parameter_examples or {}),
                   description)

    def mark(view: Callable) -> Callable:
        view.__contract__ = op
        return view

    return mark


def operation_of(view: Callable) -> Operation | None:
    """The operation recorded on a view function, if any."""
    return getattr(view, "__contract__", None)
