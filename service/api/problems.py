"""RFC 9457 problem details: every error the service returns has this one shape."""

import logging

from flask import Flask
from werkzeug.exceptions import HTTPException

from service.api.audit import audit_block, request_id
from service.api.dump import dump, json_response
from service.api.metrics import DEADLINES
from service.api.schemas import ProblemSchema
from service.engine.errors import DeadlineError

log = logging.getLogger(__name__)

PROBLEM_BASE = "https://annuity-factor-service.invalid/problems/"
#: Error paths one problem lists; further ones are counted in ``errors_omitted``.
MAX_ERROR_PATHS = 100
_TYPES = {
    400: "malformed-request",
    401: "unauthorised",
    404: "not-found",
    405: "method-not-allowed",
    406: "not-acceptable",
    413: "too-large",
    415: "unsupported-media-type",
    422: "invalid-input",
    500: "internal-error",
    503: "deadline-passed",
}


class ProblemError(Exception):
    """An error with an HTTP status, raised anywhere in the web layer."""

    def __init__(self, status: int, detail: str, *, title: str | None = None,
                 errors: dict[str, list[str]] | None = None, errors_omitted: int = 0):
        super().__init__(detail)
        self.status = status
        self.detail = detail
        self.title = title
        self.errors = errors
        self.errors_omitted = errors_omitted


def problem_response(status: int, detail: str, *, title: str | None = None,
                     errors: dict | None = None, errors_omitted: int = 0):
    from http import HTTPStatus

    if errors and len(errors) > MAX_ERROR_PATHS:
        paths = list(errors)
        errors_omitted += len(paths) - MAX_ERROR_PATHS
        errors = {path: errors[path] for path in paths[:MAX_ERROR_PATHS]}
    if errors_omitted:
        detail += (f" The first {len(errors or ())} error paths are listed; "
                   f"{errors_omitted} more are counted in errors_omitted.")
    body = {
        "type": PROBLEM_BASE + _TYPES.get(status, "error"),
        "title": title or HTTPStatus(status).phrase,
        "status": status,
        "detail": detail,
        "request_id": request_id(),
    }
    if errors:
        body["errors"] = errors
    if errors_omitted:
        body["errors_omitted"] = errors_omitted
    body["audit"] = audit_block()
    response = json_response(dump(ProblemSchema, body))
    response.status_code = status
    response.mimetype = "application/problem+json"
    return response


def init_app(app: Flask) -> None:
    @app.errorhandler(ProblemError)
    def _problem(exc: ProblemError):
        return problem_response(exc.status, exc.detail, title=exc.title, errors=exc.errors,
                                errors_omitted=exc.errors_omitted)

    @app.errorhandler(DeadlineError)
    def _deadline(exc: DeadlineError):
        from flask import request

        seconds = app.config["DEADLINE_SECONDS"]
        DEADLINES.labels(request.url_rule.rule if request.url_rule else "unmatched").inc()
        log.warning("request %s abandoned at its %g s deadline", request_id(), seconds)
        response = problem_response(
            503, f"The valuation was abandoned at its deadline of {seconds:g} s (the service "
                 "is busy, or the request is heavy): try again later, or split the batch.",
            title="Deadline passed")
        response.headers["Retry-After"] = "5"
        return response

    @app.errorhandler(HTTPException)
    def _http(exc: HTTPException):
        detail = exc.description or exc.name
        if exc.code == 413:
            detail = (f"The body is larger than the limit of "
                      f"{app.config['MAX_CONTENT_LENGTH']} bytes.")
        response = problem_response(exc.code or 500, detail)
        if exc.code == 405 and exc.valid_methods:
            response.headers["Allow"] = ", ".join(exc.valid_methods)
        return response

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception):
        # The trace goes to the log, never to the caller.
        log.exception("unhandled error in request %s", request_id())
        return problem_response(500, "The service failed to answer; the request id is in the "
                                     "log.")
