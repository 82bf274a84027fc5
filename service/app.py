"""The application factory: wires the API to a registry of bases loaded once at start-up."""

import logging
import os
from types import FunctionType

from flask import Flask

from service.bases import load_registry
from service.serving import SHIPPED_TABLES

#: The tables folder shipped with the service (the repository's tables/ in a checkout, the
#: copy inside the package once installed from a wheel).
DEFAULT_TABLES = SHIPPED_TABLES


class ServiceApp(Flask):
    """Flask, which asks of each hook and view it calls whether it is a coroutine function
    (three ``inspect`` calls a request here); a plain function's answer is kept."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._sync: dict = {}

    def ensure_sync(self, func):
        if type(func) is not FunctionType:  # (bound methods, partials: a new object each time)
            return super().ensure_sync(func)
        found = self._sync.get(func)
        if found is None:
            if len(self._sync) >= _SYNC_KEPT:  # (functions made per request would pile up)
                self._sync.clear()
            found = self._sync[func] = super().ensure_sync(func)
        return found


#: Functions whose sync check is kept (the app's hooks and views are a few dozen).
_SYNC_KEPT = 256


def create_app(config: dict | None = None) -> Flask:
    """Create the service: defaults, then the environment, then ``config`` (tests)."""
    app = ServiceApp(__name__)
    app.config.from_mapping(
        TABLES_DIR=str(DEFAULT_TABLES),
        MAX_ITEMS=10_000,
        # Work units one request may need (about one per payment date or continuous segment,
        # weighted by cost: engine/batch.py _work). The slowest accepted request of each
        # kind takes a few seconds of one core alone (bench/); with every worker busy it may
        # take several times that, so the deadline below stops it before gunicorn would.
        MAX_EVALUATION_POINTS=20_000_000,
        # Rows one cash-flow schedule may have (a daily whole-life annuity from age 20 has
        # about 40,000).
        MAX_SCHEDULE_ROWS=50_000,
        # Key-rate durations one answer may hold (items asking for them x the structure's
        # terms or bands).
        MAX_KEY_RATE_ENTRIES=200_000,
        # A valuation still running after this many seconds is abandoned with a 503.
        DEADLINE_SECONDS=30.0,
        MAX_CONTENT_LENGTH=4 * 1024 * 1024,
        REQUIRED_BASES=(),
        SERVICE_NAME="annuity-factor-service",
        # SHA-256 hex digests of accepted bearer tokens; empty means /v1 is open (local use).
        AUTH_TOKEN_SHA256=(),
    )
    if "ANNUITY_TABLES_DIR" in os.environ:
        app.config["TABLES_DIR"] = os.environ["ANNUITY_TABLES_DIR"]
    if os.environ.get("ANNUITY_REQUIRED_BASES"):
        app.config["REQUIRED_BASES"] = tuple(
            r.strip() for r in os.environ["ANNUITY_REQUIRED_BASES"].split(",") if r.strip())
    if os.environ.get("ANNUITY_DEADLINE_SECONDS"):
        app.config["DEADLINE_SECONDS"] = float(os.environ["ANNUITY_DEADLINE_SECONDS"])
    if os.environ.get("ANNUITY_TOKEN_SHA256"):
        app.config["AUTH_TOKEN_SHA256"] = tuple(
            h.strip().lower() for h in os.environ["ANNUITY_TOKEN_SHA256"].split(",") if h.strip())
    if config:
        app.config.from_mapping(config)
    app.json.sort_keys = False
    # A ref is never a path: '//' is not merged into '/' (and never redirected).
    app.url_map.merge_slashes = False
    logging.basicConfig(level=logging.INFO, format="%(message)s")

    # Loaded once, read-only afterwards; an unreadable folder stops start-up.
    app.extensions["registry"] = load_registry(app.config["TABLES_DIR"])

    from service import api
    from service.api.audit import installed_version

    app.config.setdefault("SERVICE_VERSION", installed_version())
    api.init_app(app)
    return app
