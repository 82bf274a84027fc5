"""Per-request bookkeeping: one structured log line, metrics, and optional bearer tokens."""

import hashlib
import hmac
import json
import logging
import os
import time

from flask import Flask, g, request

from service.api import metrics
from service.api.audit import request_id
from service.api.problems import ProblemError

access_log = logging.getLogger("service.access")


def _route() -> str:
    rule = request.url_rule
    return rule.rule if rule is not None else metrics.UNMATCHED


def _check_token(app: Flask) -> None:
    hashes = app.config["AUTH_TOKEN_SHA256"]
    if not hashes or not request.path.startswith("/v1/"):
        return
    header = request.headers.get("Authorization", "")
    scheme, _, token = header.partition(" ")
    digest = hashlib.sha256(token.strip().encode("utf-8")).hexdigest()
    # Compare against every stored hash, in constant time, without stopping early.
    matched = False
    for stored in hashes:
        matched |= hmac.compare_digest(digest, stored)
    if scheme.lower() != "bearer" or not token.strip() or not matched:
        raise ProblemError(401, "A valid bearer token is required for /v1 routes.",
                           title="Unauthorised")


def init_app(app: Flask) -> None:
    metrics.publish_registry(app.extensions["registry"])
    app.register_blueprint(metrics.bp)

    @app.before_request
    def _start():
        g.started = time.perf_counter()
        request_id()
        _check_token(app)

    @app.after_request
    def _finish(response):
        response.headers["X-Request-ID"] = request_id()
        if response.status_code == 401:
            response.headers["WWW-Authenticate"] = 'Bearer realm="annuity-factor-service"'
        seconds = time.perf_counter() - g.get("started", time.perf_counter())
        route = _route()
        metrics.observe(route, request.method, response.status_code, seconds)
        basis = g.get("audit_basis")
        access_log.info(json.dumps({
            "event": "request",
            "request_id": request_id(),
            "method": request.method,
            "route": route,
            "status": response.status_code,
            "duration_ms": round(seconds * 1000, 3),
            "basis": f"{basis['id']}@{basis['version']}" if basis else None,
            "basis_version": basis["version"] if basis else None,
            "items": g.get("item_count"),
            "pid": os.getpid(),
        }, separators=(",", ":")))
        return response
