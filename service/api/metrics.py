"""Prometheus metrics, correct across gunicorn workers (multiprocess mode).

When PROMETHEUS_MULTIPROC_DIR is set (deploy/gunicorn.conf.py sets it), every worker writes
its samples there and /metrics aggregates them; otherwise the process registry is used.
The metric objects are process-wide by nature of the Prometheus client, so they are created
once here, not per app.
"""

import os

from flask import Blueprint, Response, current_app
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
    multiprocess,
)

from service.api.contract import Reply, operation

bp = Blueprint("metrics", __name__)

REQUESTS = Counter("annuity_http_requests_total", "HTTP requests answered, by route and status.",
                   ["route", "method", "status"])
LATENCY = Histogram("annuity_http_request_duration_seconds",
                    "Time to answer an HTTP request, by route and status.",
                    ["route", "method", "status"],
                    buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5,
                             5.0, 10.0))
DEADLINES = Counter("annuity_deadlines_passed_total",
                    "Valuations abandoned at their deadline (answered 503), by route.", ["route"])
FACTORS = Counter("annuity_factors_computed_total",
                  "Annuity factors and schedules computed, by basis.", ["basis", "kind"])
BASIS_INFO = Gauge("annuity_basis_info", "One series per loaded basis, with its digest.",
                   ["id", "version", "digest", "status", "default"], multiprocess_mode="max")
BASES_REFUSED = Gauge("annuity_bases_refused", "Basis files refused at start-up.",
                      multiprocess_mode="max")


def publish_registry(registry) -> None:
    """Record the loaded bases as info series (called once at start-up)."""
    BASIS_INFO.clear()
    for basis in registry.listing():
        is_default = registry.is_default(basis)
        BASIS_INFO.labels(basis.id, basis.version, basis.digest, basis.status,
                          str(is_default).lower()).set(1)
    BASES_REFUSED.set(len(registry.refused))


#: Methods that keep their own label value; any other is counted as "other", so a caller
#: cannot add series (and grow the metrics files) by inventing methods.
METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH", "OPTIONS"})
#: The route label of a request that matched no route (whatever its path).
UNMATCHED = "unmatched"


def method_label(method: str) -> str:
    return method if method in METHODS else "other"


def status_label(status: int) -> str:
    return str(status) if 100 <= status <= 599 else "other"


#: The labelled series met so far. ``labels()`` takes a lock and checks its values on every
#: call; for the same values it returns the same series object as long as the metric is not
#: cleared, and these metrics never are. The label values are bounded (route rules, methods,
#: statuses; loaded bases and kinds), and so is this.
_REQUEST_SERIES: dict[tuple, tuple] = {}
_FACTOR_SERIES: dict[tuple, object] = {}


def observe(route: str, method: str, status: int, seconds: float) -> None:
    """Count one answered request; ``route`` is a route rule or ``UNMATCHED``."""
    labels = (route, method_label(method), status_label(status))
    series = _REQUEST_SERIES.get(labels)
    if series is None:
        series = _REQUEST_SERIES[labels] = (REQUESTS.labels(*labels), LATENCY.labels(*labels))
    series[0].inc()
    series[1].observe(seconds)


def count_factors(basis: str, kind: str, amount: int = 1) -> None:
    """Count ``amount`` factors (or schedules) of ``kind`` computed under ``basis``."""
    series = _FACTOR_SERIES.get((basis, kind))
    if series is None:
        series = _FACTOR_SERIES[basis, kind] = FACTORS.labels(basis, kind)
    series.inc(amount)


@bp.get("/metrics")
@operation("metrics", "Prometheus text format: requests and latency by route and status, "
                      "factors computed, one info series per loaded basis with its digest.",
           responses={200: Reply(None, "The metrics.", media="text/plain")})
def metrics():
    """Prometheus text format."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry)
    else:
        registry = REGISTRY
        publish_registry(current_app.extensions["registry"])
    return Response(generate_latest(registry), mimetype=CONTENT_TYPE_LATEST)
