"""Per-request bookkeeping: one structured log line and metrics, from the request's state;
bearer tokens are checked by service.api.auth."""

import json
import logging
import os
import time

from flask import Flask, request

from service.api import metrics
from service.api.audit import request_id
from service.api.auth import CHALLENGE, check_token
from service.api.state import current, start

access_log = logging.getLogger("service.access")
#: ``json.dumps(..., separators=(",", ":"))`` made once (dumps builds an encoder per call).
_LINE = json.JSONEncoder(separators=(",", ":")).encode


def _write_line(text: str) -> None:
    """``access_log.info(text)`` (the caller has checked that INFO is enabled).

    Where logging is set up as the service sets it up (``logging.basicConfig`` in
    create_app: one plain stream handler on the root logger writing the message alone, and
    nothing else on the way), the line is written to that handler's stream under its lock,
    as its ``emit`` would write it: the same bytes, without a LogRecord and a formatting
    pass for every request. Any other set-up (another handler or format, a filter, pytest's
    capture) gets the record through ``logging``, made directly: its place in the source is
    this function's, not looked up on the stack."""
    handler = _plain_handler()
    if handler is None:
        access_log.handle(_record(text))
        return
    handler.acquire()
    try:
        stream = handler.stream
        stream.write(text + handler.terminator)
        stream.flush()
    except RecursionError:  # (as StreamHandler.emit)
        raise
    except Exception:
        handler.handleError(_record(text))
    finally:
        handler.release()


def _record(text: str) -> logging.LogRecord:
    return access_log.makeRecord(access_log.name, logging.INFO, _HERE[0], _HERE[1], text,
                                 None, None, "_finish")


#: Where the access line is written from (for the record's pathname and line number).
_HERE = (__file__, _write_line.__code__.co_firstlineno)


def _plain_handler() -> logging.StreamHandler | None:
    """The one handler an INFO record of the access logger would reach, where it writes the
    message alone to a stream and nothing on the way filters or changes a record; else
    None."""
    if access_log.disabled:
        return None
    logger = access_log
    while logger.parent is not None:  # (the access logger and those above it, bar the root)
        if logger.handlers or logger.filters or not logger.propagate:
            return None
        logger = logger.parent
    handlers = logger.handlers
    if len(handlers) != 1 or logger.filters:
        return None
    (handler,) = handlers
    formatter = handler.formatter
    if (type(handler) is not logging.StreamHandler or handler.filters
            or handler.level > logging.INFO or type(formatter) is not logging.Formatter
            or getattr(formatter, "_fmt", None) != "%(message)s"
            or type(getattr(formatter, "_style", None)) is not logging.PercentStyle):
        return None
    return handler


def _route(req) -> str:
    rule = req.url_rule
    return rule.rule if rule is not None else metrics.UNMATCHED


def init_app(app: Flask) -> None:
    metrics.publish_registry(app.extensions["registry"])
    app.register_blueprint(metrics.bp)

    @app.before_request
    def _start():
        request_id(start(request._get_current_object(), app))  # (it starts the clock)
        check_token(app)

    @app.after_request
    def _finish(response):
        state = current()
        rid = request_id(state)
        response.headers["X-Request-ID"] = rid
        status = response.status_code
        if status == 401:
            response.headers["WWW-Authenticate"] = CHALLENGE
        seconds = time.perf_counter() - state.started
        req = state.http
        route = _route(req)
        method = req.method
        metrics.observe(route, method, status, seconds)
        if not access_log.isEnabledFor(logging.INFO):
            return response  # no line is written: none is composed
        basis = state.basis
        _write_line(_LINE({
            "event": "request",
            "request_id": rid,
            "method": method,
            "route": route,
            "status": status,
            "duration_ms": round(seconds * 1000, 3),
            "basis": f"{basis['id']}@{basis['version']}" if basis else None,
            "basis_version": basis["version"] if basis else None,
            "items": state.item_count,
            "pid": os.getpid(),
        }))
        return response
